"""Coordinate-wise verdicts for one tensor: a first pair of calls, then more where needed.

Every coordinate gets one pair of calls at x +- h. Where the central difference agrees with
the analytic value to a hundredth of the threshold and the one-sided slopes show nothing
odd, that is the verdict (about 2 calls per coordinate). The others are re-estimated on a
ladder of steps chosen from what the first pair showed (rounding noise: larger steps;
curvature on the scale of the step: smaller ones) and judged by :mod:`.verdict`: a
coordinate fails only when its discrepancy exceeds both the threshold and its error bound.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..errors import BadOutputError, ComplexStepError, UserCodeError
from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .promote import FLOAT32_AGREEMENT, disagreeing
from .refine import RATIO, ROWS, Ladder, climb, one_sided, tiny_pair
from ..status import FAIL, INCONCLUSIVE, KINK, PASS
from .verdict import SIGNIFICANCE, Judged, judge_ladder, judge_plain, judge_sides_apart, sides_differ

SETTLE_FRACTION = 1e-2  # a first estimate this far inside the threshold settles a coordinate
BEND_LIMIT = 0.05  # the slope may change by 5% across the ladder's first step
MAX_UP = 24  # steps grow at most 2**24-fold to beat rounding noise
GAP_SUSPECT = 0.1  # one-sided slopes 10% apart: look for a kink
RETRY_SHIFT = 6  # a second ladder starts 2**6 steps higher (noise) or lower (curvature)
RECHECK_LIMIT = 400  # coordinates per tensor re-estimated on a ladder
FUZZY = (
    "backward's own rounding varies by as much as the discrepancy between points a few units "
    "in the last place apart: its value is not defined that finely here"
)
BOTH_SIDES = 0.1
ABSORBED = (
    "the loss does not change at all at the steps a decision needs, though it does at larger "
    "ones: rounding in forward absorbs them (sums of much larger terms?)"
)
FLOAT32_STEP = float(np.finfo(np.float32).eps) ** (1.0 / 3.0)  # float32 code's first step
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


def _bend(probe: TensorProbe, p: Pairs, typical: float | None = None) -> np.ndarray:
    """How much the slope changes across the step, relative to the coordinate's slope (or
    to ``typical`` where that is larger), with the rounding noise of the one-sided slopes
    taken off (0 where noise hides it)."""
    right, left = p.sides(probe.f0)
    size = np.maximum(np.maximum(np.abs(p.central), np.abs(left)),
                      np.maximum(np.abs(right), typical or probe.tensor_floor))
    noise = 4 * p.noise / np.minimum(p.h_plus, p.h_minus)
    return np.maximum(np.abs(right - left) - noise, 0.0) / size


def _start_steps(probe: TensorProbe, flat: np.ndarray, first: Pairs, h: np.ndarray) -> np.ndarray:
    """The ladder's first step, probed: smaller where the slope changes on the scale of
    the step; larger where rounding noise hides the threshold, as far as pairs at steps
    16, 256, ... times larger show the slope still changing by less than BEND_LIMIT (the
    ladder's bounds hold from steps below the scale on which the slope changes)."""
    bend = _bend(probe, first)
    down = np.clip(np.ceil(np.log2(np.maximum(bend / BEND_LIMIT, 1.0))), 0, 30)
    want = SETTLE_FRACTION * probe.tolerance(flat, first.central)
    noise = 2 * first.noise / (first.h_plus + first.h_minus)
    up = np.clip(np.ceil(np.log2(np.maximum(8.0 * noise / want, 1.0))), 0, MAX_UP)
    up[down > 0] = 0
    # A re-estimate for accuracy starts up to 4 steps higher, as far as the slope's change
    # stays small next to the tensor's typical gradient.
    room = np.floor(np.log2(BEND_LIMIT / np.maximum(_bend(probe, first, probe.grad_scale), 1e-300)))
    start = h * 2.0 ** np.where(down > 0, -down, np.clip(room, 0, 2))
    climbing = np.flatnonzero(up > 2)
    if climbing.size:
        start[climbing] = _largest_smooth_step(probe, flat[climbing], h[climbing], up[climbing])
    return start


def _largest_smooth_step(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Per coordinate, the largest of h * 16**m (16**m <= 2**up) up to which the loss is
    seen to stay smooth: at every level the slope changes by at most BEND_LIMIT across the
    step, or the second difference agrees with the level below to BEND_LIMIT (a loss
    that is quadratic along the coordinate may grow its steps freely). One batch of pairs."""
    levels = int(np.ceil(up.max() / 4)) + 1
    factors = 16.0 ** np.arange(levels)
    p = probe.pairs(np.tile(flat, levels), np.concatenate([h * f for f in factors]))
    bends = _bend(probe, p).reshape(levels, flat.size)
    width = (0.5 * (p.h_plus + p.h_minus)) ** 2
    second = ((p.f_plus - 2 * probe.f0 + p.f_minus) / width).reshape(levels, flat.size)
    second_noise = (4 * p.noise / width).reshape(levels, flat.size)
    steady = np.ones((levels, flat.size), dtype=bool)
    size = np.maximum(np.abs(second[1:]), np.abs(second[:-1]))
    seen = np.abs(second) > 4.0 * second_noise  # a second difference above its noise
    steady[1:] = (np.abs(second[1:] - second[:-1]) <= BEND_LIMIT * size + second_noise[1:] + second_noise[:-1]) \
        & seen[1:] & seen[:-1]
    # Growing needs evidence, not the absence of it: the slope itself must stand above the
    # noise at that level (a loss that looks flat at every step shows nothing either way).
    slope_noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(levels, flat.size)
    seen_slope = np.abs(p.central.reshape(levels, flat.size)) > 4.0 * slope_noise
    calm = (bends <= BEND_LIMIT) | steady  # no sign of a bend (perhaps only as far as noise shows)
    smooth_so_far = np.cumprod(calm, axis=0).astype(bool)
    wanted = np.arange(levels)[:, None] * 4 <= up[None, :] + 3
    # Never beyond the params' own scale: past it the loss along a coordinate is another
    # function, and agreement there proves nothing about the derivative at the point.
    x = np.abs(probe.x[flat].astype(np.float64))
    scale = np.maximum(x, probe.x_scale)
    within = h[None, :] * factors[:, None] <= scale[None, :]
    accepted = smooth_so_far & seen_slope & wanted & within  # the top level must show its slope
    best = np.where(accepted, factors[:, None], 1.0).max(axis=0)
    return h * best


def _gap_suspects(probe: TensorProbe, flat: np.ndarray, first: Pairs) -> np.ndarray:
    right, left = first.sides(probe.f0)
    size = np.maximum(np.maximum(np.abs(left), np.abs(right)), probe.floor)
    noise = 4 * first.noise / np.minimum(first.h_plus, first.h_minus)
    return np.abs(right - left) > GAP_SUSPECT * size + noise


def _judged_ladder(probe: TensorProbe, flat: np.ndarray, ladder: Ladder) -> Judged:
    """The ladder judged, after a pair at a tiny step for the coordinates whose sides differ."""
    which = sides_differ(probe, flat, ladder)
    tiny = None
    if which.size:
        jump = ladder.right.value[which] - ladder.left.value[which]
        tiny = tiny_pair(probe, flat[which], ladder.smallest[which], jump)
    return judge_ladder(probe, flat, ladder, tiny)


def _ladder_verdicts(
    probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int = ROWS
) -> Judged:
    """Judge ``flat`` on a ladder from ``start``; undecided ones get a second ladder."""
    first = _judged_ladder(probe, flat, climb(probe, flat, start, rows))
    again = np.flatnonzero(first.status == INCONCLUSIVE)
    if again.size == 0:
        return first
    noisy = first.noise_limited[again]
    shifted = start[again] * RATIO**-RETRY_SHIFT
    if noisy.any():  # larger steps, as far as the slope is seen to stay smooth
        which = np.flatnonzero(noisy)
        shifted[which] = _largest_smooth_step(probe, flat[again][which], start[again][which],
                                              np.full(which.size, float(RETRY_SHIFT)))
    second_ladder = climb(probe, flat[again], shifted, ROWS + 2)
    judged = first.merged(again, _judged_ladder(probe, flat[again], second_ladder))
    still = np.flatnonzero(judged.status == INCONCLUSIVE)
    if still.size == 0:
        return judged
    # Last: each side on its own, on steps growing away from the point (beside a kink the
    # clean side reaches steps that beat the noise).
    smallest = np.minimum(start[still], probe.prior_steps(flat[still]))
    apart = judge_sides_apart(probe, flat[still], one_sided(probe, flat[still], smallest, -1.0),
                              one_sided(probe, flat[still], smallest, 1.0))
    keep = apart.status != INCONCLUSIVE
    return judged.merged(still[keep], apart.pick(np.flatnonzero(keep)))


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
        return _outcome(probe, flat, judged, start_count, recheck)
    cross = check_coordinates(probe, flat[doubtful], "central", recheck)
    if np.any(cross.status[judged.status[doubtful] == FAIL] != FAIL):
        central = check_coordinates(probe, flat, "central", recheck)
        return replace(central, evaluations=probe.evaluator.count - start_count,
                       note=NOT_COMPLEX_SAFE.format(tensor=probe.tensor))
    redo = Judged(cross.status, Estimate(cross.numeric, cross.error_estimate), cross.reasons,
                  cross.status == INCONCLUSIVE)
    return _outcome(probe, flat, judged.merged(doubtful, redo), start_count, recheck)


def check_coordinates(
    probe: TensorProbe, flat: np.ndarray, method: str = "central", recheck: bool = True
) -> CoordinateOutcome:
    """Verdict per coordinate ``flat`` of the probed tensor."""
    if method == "complex":
        return _complex_checked(probe, flat, recheck)
    start_count = probe.evaluator.count
    if method == "richardson":
        judged = _richardson(probe, flat, recheck)
    else:
        judged = _central(probe, flat, recheck)
    return _outcome(probe, flat, judged, start_count, recheck)


def _central(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> Judged:
    """A pair of calls per coordinate; a probed ladder where that does not settle it."""
    a = probe.a[flat]
    h = probe.prior_steps(flat)
    first = probe.pairs(flat, h)
    c = first.central
    judged = judge_plain(probe, flat, Estimate(c, 2 * first.noise / (first.h_plus + first.h_minus)))
    settled = np.abs(a - c) <= SETTLE_FRACTION * probe.tolerance(flat, c)
    todo = np.flatnonzero(~settled | _gap_suspects(probe, flat, first))
    if todo.size == 0 or not recheck:
        return judged
    if todo.size > RECHECK_LIMIT:  # the worst first, within budget
        todo = np.sort(todo[np.argsort(-np.abs(a[todo] - c[todo]), kind="stable")[:RECHECK_LIMIT]])
    start = _start_steps(probe, flat[todo], _pick(first, todo), h[todo])
    return _unabsorbed(probe, judged.merged(todo, _ladder_verdicts(probe, flat[todo], start)), first)


def _unabsorbed(probe: TensorProbe, judged: Judged, first: Pairs) -> Judged:
    """A failure read off a loss that did not change at all (an estimate of exactly 0),
    where the first pair saw it change on both sides alike (the smaller change at least
    BOTH_SIDES of the larger, as slope and curvature give), is rounding in forward absorbing the
    smaller steps (float32 sums of much larger terms), not evidence of a derivative of 0.
    (A loss flat near the point, a unit switched off, changes on one side only: the step
    that reached the kink.)"""
    first_central = first.central
    up, down = np.abs(first.f_plus - probe.f0), np.abs(first.f_minus - probe.f0)
    both = (np.minimum(up, down) >= BOTH_SIDES * np.maximum(up, down)) & (first_central != 0.0)
    absorbed = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0) & both)
    if absorbed.size == 0:
        return judged
    undecided = Judged(np.full(absorbed.size, INCONCLUSIVE, dtype=judged.status.dtype),
                       Estimate(first_central[absorbed], np.full(absorbed.size, np.inf)),
                       (ABSORBED,) * absorbed.size, np.ones(absorbed.size, dtype=bool))
    return judged.merged(absorbed, undecided)


def _richardson(probe: TensorProbe, flat: np.ndarray, recheck: bool) -> Judged:
    """Three rows of a ladder per coordinate (6 calls) from a step sized for a sixth-order
    rule; coordinates whose bound is not far inside the threshold go the central way."""
    h = RICHARDSON_START * np.maximum(1.0, np.abs(probe.x[flat].astype(np.float64)))
    ladder = climb(probe, flat, h, 3)
    judged = _judged_ladder(probe, flat, ladder)
    if not recheck:
        return judged
    # Bounds not far inside the threshold for want of smaller steps (not for rounding, which
    # smaller steps only make worse): the same ladder two rows further down (4 calls).
    short = judged.estimate.error > SETTLE_FRACTION * probe.tolerance(flat, judged.estimate.value)
    wide = np.flatnonzero(short & ~judged.noise_limited)
    if wide.size:
        longer = _judged_ladder(probe, flat[wide], climb(probe, flat[wide], h[wide], 5, ladder.rows_of(wide)))
        better = np.flatnonzero((longer.estimate.error < judged.estimate.error[wide]) | (judged.status[wide] != PASS))
        judged = judged.merged(wide[better], longer.pick(better))
    value = judged.estimate.value
    loose = judged.estimate.error > SETTLE_FRACTION * probe.tolerance(flat, value)
    todo = np.flatnonzero((judged.status != PASS) | loose)
    if todo.size == 0:
        return judged
    again = _central(probe, flat[todo], recheck)
    keep = (again.status != PASS) | (again.estimate.error < judged.estimate.error[todo])
    return judged.merged(todo[keep], again.pick(np.flatnonzero(keep)))


def _outcome(probe: TensorProbe, flat: np.ndarray, judged: Judged, start_count: int,
             recheck: bool) -> CoordinateOutcome:
    a = probe.a[flat].copy()
    numeric = judged.estimate.value
    scale = probe.denominators(flat, numeric)
    status = judged.status
    error_estimate = judged.estimate.error
    reasons = judged.reasons
    if probe.float32 is not None:  # float32 code judged on its float64 run
        own = probe.float32
        off = np.flatnonzero(disagreeing(own.a[flat], a, scale))
        status, numeric, error_estimate = status.copy(), numeric.copy(), error_estimate.copy()
        if off.size:  # a kink that float32 rounding puts at the point, on the float64 run?
            sided = _float32_side(probe, flat[off], own.a[flat][off], scale[off])
            if sided is not None:
                took, side = sided
                k = off[took]
                status[k] = np.maximum(status[k], KINK)
                numeric[k], error_estimate[k] = side.value, side.error
                a[k] = own.a[flat][k]
                off = off[~took]
        if off.size:  # the float32 value on the float32 code itself
            redo = _central(own, flat[off], recheck)  # counted with the check's calls
            # The worse verdict stands, with its own reason and numbers.
            worse = redo.status >= status[off]
            status[off] = np.maximum(status[off], redo.status)
            numeric[off[worse]] = redo.estimate.value[worse]
            error_estimate[off[worse]] = redo.estimate.error[worse]
            a[off] = own.a[flat][off]  # report the value the code returns
            redone = {k: r for k, r, w in zip(off.tolist(), redo.reasons, worse) if w}
            reasons = tuple(redone.get(k, r) for k, r in enumerate(reasons))
        scale = probe.denominators(flat, numeric)
    status, reasons = _unfuzzed(probe, flat, a, numeric, error_estimate, status, reasons)
    err = np.abs(a - numeric)
    return CoordinateOutcome(
        flat=flat, analytic=a, numeric=numeric, error_estimate=error_estimate,
        rel=err / scale, abs=err, scale=scale, status=status,
        reasons=reasons, evaluations=probe.evaluator.count - start_count,
    )


def _unfuzzed(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray, error: np.ndarray,
    status: np.ndarray, reasons: tuple[str | None, ...],
) -> tuple[np.ndarray, tuple[str | None, ...]]:
    """Failures that the analytic value's own fuzz explains are undecided: where backward's
    rounding varies by the discrepancy's share between points a few units in the last place
    apart (a loss at the rounding level of its own terms), its value is not defined finely
    enough for the discrepancy to be a bug's (see point.Point.jitter)."""
    failing = np.flatnonzero(status == FAIL)
    if failing.size == 0 or probe.jitter is None:
        return status, reasons
    jitter = probe.jitter()
    if jitter is None:
        return status, reasons
    fuzzy = np.abs(a[failing] - numeric[failing]) <= SIGNIFICANCE * (error[failing] + jitter[flat[failing]])
    if not fuzzy.any():
        return status, reasons
    status = status.copy()
    status[failing[fuzzy]] = INCONCLUSIVE
    listed = list(reasons)
    for k in failing[fuzzy].tolist():
        listed[k] = FUZZY
    return status, tuple(listed)


def _float32_side(
    probe: TensorProbe, flat: np.ndarray, float32: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, Estimate] | None:
    """Which float32 gradients that leave their float64 run are explained by a kink of the
    float64 run within float32's resolution: at one of the steps float32 code would take
    (its first step, and 16 and 256 times smaller) the one-sided quotients of the float64 run
    lie further apart than float32 agreement and than curvature makes them, and the float32
    value lies between them (float32 rounding puts the code on the kink, or on its other
    side, where the float64 run is just off it). With the estimate each is judged by."""
    n = flat.size
    x = np.abs(probe.x[flat].astype(np.float64))
    steps = np.concatenate([FLOAT32_STEP * np.maximum(1.0, x) / 16.0**k for k in range(3)])
    p = probe.pairs(np.tile(flat, 3), steps)
    right, left = (q.reshape(3, n) for q in p.sides(probe.f0))
    noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(3, n)
    tol = FLOAT32_AGREEMENT * scale
    # The gap curvature alone would give at each step, from the smallest step's gap.
    bend = np.abs(right[2] - left[2]) / steps.reshape(3, n)[2]
    curved = 2.0 * bend * steps.reshape(3, n)
    curved[2] = 0.0
    apart = np.abs(right - left) > tol + 2.0 * noise + curved
    between = (float32 >= np.minimum(left, right) - tol - noise) & (float32 <= np.maximum(left, right) + tol + noise)
    fits = apart & between
    took = fits.any(axis=0)
    if not took.any():
        return None
    row = np.argmax(fits, axis=0)  # the largest step that explains it
    cols = np.arange(n)
    lv, rv, nv = left[row, cols], right[row, cols], noise[row, cols]
    nearer = np.where(np.abs(float32 - lv) <= np.abs(float32 - rv), lv, rv)
    return took, Estimate(nearer[took], nv[took])


def _pick(p: Pairs, which: np.ndarray) -> Pairs:
    return Pairs(p.f_plus[which], p.f_minus[which], p.h_plus[which], p.h_minus[which], p.noise[which])


__all__ = ["FAIL", "INCONCLUSIVE", "PASS", "CoordinateOutcome", "check_coordinates"]
