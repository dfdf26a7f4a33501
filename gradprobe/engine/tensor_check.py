"""Checking one tensor: which coordinates and directions, localisation, the summary."""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np

from ..hints import Evidence
from ..options import CheckOptions
from ..report import DirectionResult
from .coordinates import CoordinateOutcome, check_coordinates
from .directions import DirectionCheck, check_direction, unit_direction
from .locate import locate
from .probe import TensorProbe
from .sampling import stratified, tensor_rng
from ..status import FAIL, Status
from .summary import tensor_result

if TYPE_CHECKING:
    from ..report import TensorResult

EXTRA_DIRECTIONS = 2  # drawn per direction that kinks hid
UNCONFIRMED = (
    "a random-direction check disagrees beyond the threshold, but localisation confirmed "
    "no coordinate (several small errors, or kinks along the direction)"
)


def plan(options: CheckOptions, size: int, total: int) -> tuple[int, int]:
    """(coordinates to check, random directions) for a tensor of ``size`` elements in a
    target with ``total`` checkable coordinates.

    A target of at most ``sweep_total`` coordinates is swept in full; in a larger one only
    tensors of at most ``sweep_limit`` elements are, the others are sampled and get
    directional checks.
    """
    full = total <= options.sweep_total or size <= options.sweep_limit
    if options.sample is not None:
        coordinates = options.sample
    elif full:
        coordinates = size
    else:
        coordinates = options.default_sample
    if options.directions is not None:
        directions = options.directions
    elif not full or options.sample == 0:
        directions = options.default_directions
    else:
        directions = 0
    return min(coordinates, size), directions


def _direction_result(probe: TensorProbe, d: DirectionCheck) -> DirectionResult:
    numeric = d.analytic + d.discrepancy
    scale = max(abs(d.analytic), abs(numeric), probe.floor)
    return DirectionResult(
        analytic=d.analytic, numeric=numeric, error_estimate=d.error,
        rel_error=abs(d.discrepancy) / scale, ok=not d.significant,
        evaluations=d.evaluations, kink=d.kink,
    )


def _enough(probe: TensorProbe) -> float:
    """The bound at which a direction needs no larger steps: a tenth of what one element
    wrong by the threshold, at the tensor's typical gradient, adds along a random unit
    direction (rms(a) * threshold / sqrt(n))."""
    return 0.1 * probe.threshold * probe.grad_scale / max(probe.size, 1) ** 0.5


def _directions(
    probe: TensorProbe, count: int, seed: int
) -> tuple[list[DirectionCheck], list[np.ndarray | None]]:
    """``count`` directional checks; a direction hidden by kinks is replaced (twice at most)."""
    rng = tensor_rng(seed, probe.tensor, "directions")
    everything = slice(0, probe.size)
    checks: list[DirectionCheck] = []
    units: list[np.ndarray | None] = []
    budget = count * (1 + EXTRA_DIRECTIONS)
    while len([c for c in checks if not c.kink]) < count and len(checks) < budget:
        u = unit_direction(probe.size, rng)
        checks.append(check_direction(probe, everything, u, enough=_enough(probe)))
        units.append(u if checks[-1].significant else None)  # kept only for localisation
    return checks, units


def check_tensor(
    probe: TensorProbe, options: CheckOptions, total: int, shape: tuple[int, ...],
    layer: str, kind: str, dtype: np.dtype,
) -> tuple[TensorResult, Evidence, CoordinateOutcome]:
    """The tensor's result (without a hint), the evidence hints are drawn from, and the
    coordinate outcome."""
    ev = probe.evaluator
    start = ev.count
    n_coords, n_dirs = plan(options, probe.size, total)
    flat = stratified(shape, n_coords, tensor_rng(options.seed, probe.tensor, "sample"), probe.a)
    directions: tuple[DirectionResult, ...] = ()
    located = None
    unconfirmed = False
    if n_dirs:
        checks, units = _directions(probe, n_dirs, options.seed)
        directions = tuple(_direction_result(probe, c) for c in checks)
        off = [k for k, c in enumerate(checks) if c.significant]
        if off:
            j = max(off, key=lambda k: abs(checks[k].discrepancy) / max(checks[k].error, 1e-300))
            u = units[j]
            assert u is not None
            found = locate(probe, u, checks[j].discrepancy, checks[j].error)
            located = found.evaluations
            flat = np.union1d(flat, found.candidates)
            unconfirmed = any(c.significant and d.rel_error > probe.threshold
                              for c, d in zip(checks, directions))
    outcome = check_coordinates(probe, flat, options.method, options.recheck)
    result = tensor_result(probe.tensor, layer, kind, shape, dtype, outcome,
                           directions=directions, located_evaluations=located,
                           evaluations=ev.count - start)
    if unconfirmed and result.status in (Status.PASS, Status.KINK):
        result = replace(result, status=Status.INCONCLUSIVE, inconclusive_reason=UNCONFIRMED)
    return result, evidence_of(probe.tensor, shape, outcome), outcome


def evidence_of(tensor: str, shape: tuple[int, ...], outcome: CoordinateOutcome) -> Evidence:
    """What hints are drawn from: the checked coordinates and which of them fail."""
    return Evidence(tensor, tuple(shape), outcome.flat, outcome.analytic, outcome.numeric,
                    outcome.status == FAIL)


def failed_later(result: TensorResult, before: CoordinateOutcome, after: CoordinateOutcome,
                 dtype: np.dtype) -> TensorResult:
    """``result`` (summarised from ``before``) summarised again from ``after``, in which more
    coordinates fail; the calls spent between the two are added to the tensor's count."""
    return tensor_result(result.name, result.layer, result.kind, result.shape, dtype, after,
                         directions=result.directions,
                         located_evaluations=result.located_evaluations,
                         evaluations=(result.evaluations or 0) + after.evaluations - before.evaluations)
