"""Checking one tensor: which coordinates and directions, localisation, the summary."""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np

from ..diagnose import Evidence
from ..options import CheckOptions
from ..report import DirectionResult
from . import compare
from .compare import FAIL
from .coordinates import Problem, check_coordinates
from .directions import Slope, needed_precision, random_directions, slope
from .locate import locate
from .sampling import stratified, tensor_rng
from .summary import tensor_result

if TYPE_CHECKING:
    from ..report import TensorResult
    from .runner import Context


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


def _direction_results(s: Slope, a: np.ndarray, per_direction: int) -> tuple[DirectionResult, ...]:
    numeric = s.analytic + s.discrepancy
    floor = compare.FLOOR_FRACTION * float(np.sqrt(np.mean(a**2))) if a.size else 0.0
    scale = compare.denominators(s.analytic, numeric, max(floor, float(np.finfo(float).tiny)))
    rel = np.abs(s.discrepancy) / scale
    significant = s.significant()
    return tuple(
        DirectionResult(
            analytic=float(s.analytic[k]), numeric=float(numeric[k]),
            error_estimate=float(s.error[k]), rel_error=float(rel[k]),
            ok=not bool(significant[k]), evaluations=per_direction, kink=bool(s.kink[k]),
        )
        for k in range(len(s.analytic))
    )


def check_tensor(ctx: "Context", name: str, grad: np.ndarray) -> tuple["TensorResult", Evidence]:
    """The tensor's result (without a hint) and the evidence hints are drawn from."""
    ws, ev, options = ctx.workspace, ctx.evaluator, ctx.options
    owner = ws.owners[name]
    start = ev.count
    values = owner.reshape(-1).copy()
    analytic = grad.reshape(-1)
    n_coords, n_dirs = plan(options, owner.size, ctx.total)
    flat = stratified(owner.shape, n_coords, tensor_rng(options.seed, name, "sample"), analytic)
    directions: tuple[DirectionResult, ...] = ()
    located = None
    unconfirmed = False
    if n_dirs:
        units = random_directions(owner.size, n_dirs, tensor_rng(options.seed, name, "directions"))
        everything = np.arange(owner.size, dtype=np.int64)
        s = slope(ev, name, everything, values, analytic, units, ctx.compute_dtype, ctx.f0,
                  precision=needed_precision(analytic, ctx.threshold))
        directions = _direction_results(s, analytic, s.evaluations // n_dirs)
        off = [k for k, d in enumerate(directions) if not d.ok]
        if off:
            j = max(off, key=lambda k: abs(s.discrepancy[k]) / max(s.error[k], 1e-300))
            found = locate(ev, name, values, analytic, units[j], float(s.discrepancy[j]),
                           float(s.error[j]), ctx.compute_dtype, ctx.f0)
            located = found.evaluations
            flat = np.union1d(flat, found.candidates)
            unconfirmed = any(not d.ok and d.rel_error > ctx.threshold for d in directions)
    problem = Problem(name, flat, values[flat], analytic[flat], ctx.f0, ctx.compute_dtype, ctx.threshold)
    outcome = check_coordinates(ev, problem, options.method, options.recheck)
    result = tensor_result(name, ws.layer(name), ws.kind(name), owner, outcome,
                           directions=directions, located_evaluations=located,
                           evaluations=ev.count - start)
    if unconfirmed and result.status in ("pass", "kink"):
        result = replace(result, status="inconclusive", hint=(
            "a random-direction check disagrees beyond the threshold but no coordinate was "
            "confirmed wrong (a kink along the direction, or many errors each below the "
            "threshold)"))
    evidence = Evidence(name, tuple(owner.shape), outcome.flat, outcome.analytic,
                        outcome.numeric, outcome.status == FAIL)
    return result, evidence
