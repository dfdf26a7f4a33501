"""Coordinate-wise checks of one tensor: numeric slopes, verdicts, kinks, re-checks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import BadOutputError, ComplexStepError, UserCodeError
from . import compare
from .compare import FAIL, INCONCLUSIVE, KINK, PASS
from .differences import Slopes, slopes
from .evaluate import Evaluator, Perturbation
from .extrapolate import coordinate_central, extrapolate
from .kinks import classify, gap_suspects

COMPLEX_STEP = 1e-20  # relative; any tiny step works since nothing is subtracted
RECHECK_LIMIT = 200  # failing coordinates per tensor re-checked by extrapolation


@dataclass(frozen=True)
class CoordinateOutcome:
    """Per checked coordinate (flat index order as given)."""

    flat: np.ndarray
    analytic: np.ndarray
    numeric: np.ndarray
    error_estimate: np.ndarray
    rel: np.ndarray
    abs: np.ndarray
    scale: np.ndarray  # the denominator of rel per coordinate
    status: np.ndarray
    evaluations: int


@dataclass(frozen=True)
class Problem:
    """One tensor's coordinates to check, and how."""

    tensor: str
    flat: np.ndarray
    x: np.ndarray  # the coordinates' values, in the tensor's dtype
    analytic: np.ndarray  # float64
    f0: float
    compute_dtype: np.dtype
    threshold: float


def _subset(s: Slopes, mask: np.ndarray) -> Slopes:
    return Slopes(s.central[mask], s.left[mask], s.right[mask], s.noise[mask])


def _complex_step(evaluator: Evaluator, p: Problem) -> tuple[np.ndarray, np.ndarray]:
    h = COMPLEX_STEP * np.maximum(1.0, np.abs(p.x.astype(np.float64)))
    requests = [
        Perturbation(p.tensor, p.flat[i : i + 1], np.array([p.x[i] + 1j * h[i]]))
        for i in range(p.flat.size)
    ]
    try:
        values = evaluator.losses(requests)
    except (UserCodeError, BadOutputError) as exc:
        raise ComplexStepError(
            f"forward cannot take complex inputs, so --method complex cannot be used "
            f"({exc.message})"
        ) from exc
    if not np.any(values.imag) and np.any(p.analytic):
        raise ComplexStepError(
            "forward drops the imaginary part of complex inputs, so --method complex cannot "
            "be used (np.real, float(), astype(float) or abs() in forward?)"
        )
    numeric = values.imag / h
    eps = float(np.finfo(np.float64).eps)
    return numeric, 8 * eps * np.maximum(np.abs(numeric), np.abs(p.analytic))


def _kinks(
    evaluator: Evaluator, p: Problem, wide: Slopes, status: np.ndarray, floor: float
) -> np.ndarray:
    """Re-judge suspects that sit on a kink, in place; returns the mask of kinked coordinates."""
    kinked = np.zeros(status.shape, dtype=bool)
    suspects = (status != PASS) | gap_suspects(wide, floor)
    if not suspects.any():
        return kinked
    which = np.flatnonzero(suspects)
    narrow = slopes(evaluator, p.tensor, p.flat[which], p.x[which], p.f0, p.compute_dtype, 0.5)
    a = p.analytic[which]
    tol = p.threshold * compare.denominators(a, wide.central[which], floor)
    at_kink, consistent = classify(_subset(wide, which), narrow, a, tol)
    status[which[at_kink & consistent]] = KINK
    status[which[at_kink & ~consistent]] = FAIL
    kinked[which[at_kink]] = True
    return kinked


def _recheck(
    evaluator: Evaluator, p: Problem, numeric: np.ndarray, noise: np.ndarray,
    status: np.ndarray, floor: float, kinked: np.ndarray,
) -> None:
    """Extrapolate the worst failing coordinates (not those at a kink) before failing them."""
    suspects = np.flatnonzero(((status == FAIL) | (status == INCONCLUSIVE)) & ~kinked)
    if suspects.size == 0:
        return
    if suspects.size > RECHECK_LIMIT:
        err = np.abs(p.analytic[suspects] - numeric[suspects])
        suspects = suspects[np.argsort(-err, kind="stable")[:RECHECK_LIMIT]]
    a = p.analytic[suspects]
    tol = p.threshold * compare.denominators(a, numeric[suspects], floor)
    central = coordinate_central(evaluator, p.tensor, p.flat[suspects], p.x[suspects], p.compute_dtype)
    better = extrapolate(central, suspects.size, analytic=a, tolerance=tol)
    numeric[suspects] = better.value
    noise[suspects] = better.error
    status[suspects] = compare.judge(a, better.value, better.error, p.threshold, floor)


def check_coordinates(
    evaluator: Evaluator, p: Problem, method: str = "central", recheck: bool = True
) -> CoordinateOutcome:
    """Verdict per coordinate of ``p`` with the chosen numeric method."""
    start = evaluator.count
    if method == "complex":
        numeric, noise = _complex_step(evaluator, p)
    elif method == "richardson":  # slopes at one step are only needed for suspects
        central = coordinate_central(evaluator, p.tensor, p.flat, p.x, p.compute_dtype)
        result = extrapolate(central, p.flat.size)
        numeric, noise = result.value, result.error
    else:
        wide = slopes(evaluator, p.tensor, p.flat, p.x, p.f0, p.compute_dtype)
        numeric, noise = wide.central.copy(), wide.noise.copy()
    floor = compare.floor_scale(p.analytic, numeric)
    status = compare.judge(p.analytic, numeric, noise, p.threshold, floor)
    if method == "central":
        kinked = _kinks(evaluator, p, wide, status, floor)
        if recheck:
            _recheck(evaluator, p, numeric, noise, status, floor, kinked)
    elif method == "richardson" and (status != PASS).any():  # kinks among the suspects
        which = np.flatnonzero(status != PASS)
        sub = Problem(p.tensor, p.flat[which], p.x[which], p.analytic[which], p.f0,
                      p.compute_dtype, p.threshold)
        wide = slopes(evaluator, sub.tensor, sub.flat, sub.x, sub.f0, sub.compute_dtype)
        sub_status = status[which]
        _kinks(evaluator, sub, wide, sub_status, floor)
        status[which] = sub_status
    err = np.abs(p.analytic - numeric)
    return CoordinateOutcome(
        flat=p.flat,
        analytic=p.analytic,
        numeric=numeric,
        error_estimate=noise,
        rel=compare.relative_errors(p.analytic, numeric, floor),
        abs=err,
        scale=compare.denominators(p.analytic, numeric, floor),
        status=status,
        evaluations=evaluator.count - start,
    )
