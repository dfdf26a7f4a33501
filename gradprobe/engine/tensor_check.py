"""Checking one tensor: which coordinates and directions, localisation, the coordinates."""

from __future__ import annotations

import numpy as np

from ..options import CheckOptions
from ..report import DirectionResult
from .coordinates import check_coordinates
from .directions import DirectionCheck, check_direction, unit_direction
from .locate import locate
from .probe import TensorProbe
from .record import TensorRecord
from .sampling import stratified, tensor_rng

EXTRA_DIRECTIONS = 2  # drawn per direction that kinks hid


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


def check_tensor(probe: TensorProbe, options: CheckOptions, total: int, record: TensorRecord) -> None:
    """Check the probed tensor by the plan for its size (``total``: the target's checkable
    coordinates): directions, localisation, coordinates. Annotates ``record``."""
    ev = probe.evaluator
    start = ev.count
    n_coords, n_dirs = plan(options, probe.size, total)
    flat = stratified(record.shape, n_coords, tensor_rng(options.seed, probe.tensor, "sample"), probe.a)
    again = options.also_check.get(probe.tensor)
    if again is not None and tuple(again[0]) == tuple(record.shape):  # an earlier run's coordinates
        flat = np.union1d(flat, np.asarray(again[1], dtype=np.int64))
    if n_dirs:
        checks, units = _directions(probe, n_dirs, options.seed)
        record.directions = tuple(_direction_result(probe, c) for c in checks)
        off = [k for k, c in enumerate(checks) if c.significant]
        if off:
            j = max(off, key=lambda k: abs(checks[k].discrepancy) / max(checks[k].error, 1e-300))
            u = units[j]
            assert u is not None
            found = locate(probe, u, checks[j].discrepancy, checks[j].error)
            record.located_evaluations = found.evaluations
            flat = np.union1d(flat, found.candidates)
            record.unconfirmed = any(c.significant and d.rel_error > probe.threshold
                                     for c, d in zip(checks, record.directions))
    record.outcome = check_coordinates(probe, flat, options.method, options.recheck)
    record.evaluations = ev.count - start
