"""Coordinate-wise verdicts for one tensor: a first pair of calls, then more where needed.

Every coordinate gets one pair of calls at x +- h. Where the central difference agrees with
the analytic value to a hundredth of the threshold and the one-sided slopes show nothing
odd, that is the verdict (about 2 calls per coordinate). The others are re-estimated on a
ladder of steps chosen from what the first pair showed (rounding noise: larger steps;
curvature on the scale of the step: smaller ones) and judged by :mod:`.verdict`: a
coordinate fails only when its discrepancy exceeds both the threshold and its error bound.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import BadOutputError, ComplexStepError, UserCodeError
from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .refine import RATIO, ROWS, climb
from .status import FAIL, INCONCLUSIVE, PASS
from .verdict import Judged, judge_ladder, judge_plain

SETTLE_FRACTION = 1e-2  # a first estimate this far inside the threshold settles a coordinate
BEND_LIMIT = 0.05  # the slope may change by 5% across the ladder's first step
GAP_SUSPECT = 0.1  # one-sided slopes 10% apart: look for a kink
RETRY_SHIFT = 6  # a second ladder starts 2**6 steps higher (noise) or lower (curvature)
RECHECK_LIMIT = 400  # coordinates per tensor re-estimated on a ladder
RICHARDSON_START = 2.0**-7  # relative first step of --method richardson (3 rows, 6 calls)


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
    reasons: tuple[str | None, ...]
    evaluations: int
    note: str | None = None  # said once for the tensor (a method fallen back from)


def _start_steps(probe: TensorProbe, flat: np.ndarray, first: Pairs, h: np.ndarray) -> np.ndarray:
    """The ladder's first step, probed from the first pair: larger where rounding noise
    hides the threshold, smaller where the slope changes on the scale of the step."""
    c = first.central
    want = SETTLE_FRACTION * probe.tolerance(flat, c)
    noise = 2 * first.noise / (first.h_plus + first.h_minus)
    up = np.clip(np.ceil(np.log2(np.maximum(8.0 * noise / want, 1.0))), 0, 24)
    right = (first.f_plus - probe.f0) / first.h_plus
    left = (probe.f0 - first.f_minus) / first.h_minus
    size = np.maximum(np.maximum(np.abs(c), np.abs(left)), np.maximum(np.abs(right), probe.floor))
    bend = np.abs(right - left) / size
    down = np.clip(np.ceil(np.log2(np.maximum(bend / BEND_LIMIT, 1.0))), 0, 30)
    # Larger steps only as far as the bend seen at the first pair allows (the ladder's
    # bounds hold from steps below the scale on which the slope changes, not above it).
    room = np.floor(np.log2(BEND_LIMIT / np.maximum(bend, 1e-300)))
    up = np.minimum(up + 2, np.maximum(room, 0))
    shift = np.where(down > 0, -down, up)
    return h * 2.0**shift


def _gap_suspects(probe: TensorProbe, flat: np.ndarray, first: Pairs) -> np.ndarray:
    right = (first.f_plus - probe.f0) / first.h_plus
    left = (probe.f0 - first.f_minus) / first.h_minus
    size = np.maximum(np.maximum(np.abs(left), np.abs(right)), probe.floor)
    noise = 4 * first.noise / np.minimum(first.h_plus, first.h_minus)
    return np.abs(right - left) > GAP_SUSPECT * size + noise


def _ladder_verdicts(
    probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int = ROWS
) -> Judged:
    """Judge ``flat`` on a ladder from ``start``; undecided ones get a second ladder."""
    first = judge_ladder(probe, flat, climb(probe, flat, start, rows))
    again = np.flatnonzero(first.status == INCONCLUSIVE)
    if again.size == 0:
        return first
    noisy = first.noise_limited[again]
    shifted = start[again] * RATIO ** np.where(noisy, RETRY_SHIFT, -RETRY_SHIFT)
    second = judge_ladder(probe, flat[again], climb(probe, flat[again], shifted, ROWS + 2))
    return first.merged(again, second)


COMPLEX_STEP = 1e-20  # relative; any tiny step works since nothing is subtracted
NOT_COMPLEX_SAFE = (
    "forward is not complex-safe for {tensor} (the complex step and central differences "
    "disagree: np.abs, np.var, conjugation or np.real in its path?), so central differences "
    "were used for it"
)


def _complex_step(probe: TensorProbe, flat: np.ndarray) -> Estimate:
    """Im f(x + ih) / h (Squire & Trapp, SIAM Review 40(1), 1998): one call a coordinate."""
    h = COMPLEX_STEP * np.maximum(1.0, np.abs(probe.x[flat].astype(np.float64)))
    try:
        values = probe.complex_losses(flat, h)
    except (UserCodeError, BadOutputError) as exc:
        raise ComplexStepError(
            f"forward cannot take complex inputs, so --method complex cannot be used "
            f"({exc.message})"
        ) from exc
    if not np.any(values.imag) and np.any(probe.a[flat]):
        raise ComplexStepError(
            "forward drops the imaginary part of complex inputs, so --method complex cannot "
            "be used (np.real, float(), astype(float) or abs() in forward?)"
        )
    numeric = values.imag / h
    return Estimate(numeric, 8 * np.finfo(np.float64).eps * np.maximum(np.abs(numeric), np.abs(probe.a[flat])))


def _complex_checked(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> CoordinateOutcome:
    """The complex step, never trusted alone: coordinates it does not pass are re-checked
    by central differences; where those pass, the forward is not complex-safe for this
    tensor and central differences decide every coordinate of it."""
    start_count = probe.evaluator.count
    judged = judge_plain(probe, flat, _complex_step(probe, flat))
    doubtful = np.flatnonzero(judged.status != PASS)
    if doubtful.size == 0:
        return _outcome(probe, flat, judged, start_count)
    cross = check_coordinates(probe, flat[doubtful], "central", recheck)
    if np.any(cross.status[judged.status[doubtful] == FAIL] != FAIL):
        central = check_coordinates(probe, flat, "central", recheck)
        return CoordinateOutcome(**{**central.__dict__, "evaluations": probe.evaluator.count - start_count,
                                    "note": NOT_COMPLEX_SAFE.format(tensor=probe.tensor)})
    redo = Judged(cross.status, Estimate(cross.numeric, cross.error_estimate), cross.reasons,
                  cross.status == INCONCLUSIVE)
    return _outcome(probe, flat, judged.merged(doubtful, redo), start_count)


def check_coordinates(
    probe: TensorProbe, flat: np.ndarray, method: str = "central", recheck: bool = True
) -> CoordinateOutcome:
    """Verdict per coordinate ``flat`` of the probed tensor."""
    if method == "complex":
        return _complex_checked(probe, flat, recheck)
    start_count = probe.evaluator.count
    a = probe.a[flat]
    if method == "richardson":
        h = RICHARDSON_START * np.maximum(1.0, np.abs(probe.x[flat].astype(np.float64)))
        judged = judge_ladder(probe, flat, climb(probe, flat, h, 3), settle=True)
        todo = np.flatnonzero(judged.status != PASS)
        if todo.size and recheck:
            redo = _ladder_verdicts(probe, flat[todo], h[todo] / 4)
            judged = judged.merged(todo, redo)
    else:
        h = probe.prior_steps(flat)
        first = probe.pairs(flat, h)
        c = first.central
        estimate = Estimate(c, 2 * first.noise / (first.h_plus + first.h_minus))
        judged = judge_plain(probe, flat, estimate)
        settled = np.abs(a - c) <= SETTLE_FRACTION * probe.tolerance(flat, c)
        todo = np.flatnonzero(~settled | _gap_suspects(probe, flat, first))
        if todo.size and recheck:
            if todo.size > RECHECK_LIMIT:  # the worst first, within budget
                todo = np.sort(todo[np.argsort(-np.abs(a[todo] - c[todo]), kind="stable")[:RECHECK_LIMIT]])
            start = _start_steps(probe, flat[todo], _pick(first, todo), h[todo])
            judged = judged.merged(todo, _ladder_verdicts(probe, flat[todo], start))
    return _outcome(probe, flat, judged, start_count)


def _outcome(probe: TensorProbe, flat: np.ndarray, judged: Judged, start_count: int) -> CoordinateOutcome:
    a = probe.a[flat]
    numeric = judged.estimate.value
    scale = probe.denominators(flat, numeric)
    err = np.abs(a - numeric)
    return CoordinateOutcome(
        flat=flat, analytic=a, numeric=numeric, error_estimate=judged.estimate.error,
        rel=err / scale, abs=err, scale=scale, status=judged.status,
        reasons=judged.reasons, evaluations=probe.evaluator.count - start_count,
    )


def _pick(p: Pairs, which: np.ndarray) -> Pairs:
    return Pairs(p.f_plus[which], p.f_minus[which], p.h_plus[which], p.h_minus[which], p.noise[which])


__all__ = ["CoordinateOutcome", "check_coordinates", "FAIL", "INCONCLUSIVE", "PASS"]
