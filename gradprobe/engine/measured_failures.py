"""float64 failures the ladders judged on the assumed rounding, judged again on the rounding
measured along the coordinate (withholding only: a failure stands where that judgment fails
too).

The ladders take one loss value's rounding as FLOAT64_ROUNDING_UNITS (8) units of eps |f|.
When one coordinate alone moves, what does not depend on it rounds the same way every time and
cancels: the real rounding along it is often a unit or two (:mod:`.steep_noise`). The assumed
figure is then not conservative everywhere. A kink crossed among the ladder's smallest steps
moves a side's quotients by less than that figure's allowance at those steps (it grows like
1/h), so neither the kink tests (:func:`.refine.crossed_kinks`) nor the tableau's own checks
see the crossing, and the side's tableau keeps an early extrapolation that the later rows,
settled on another value, contradict (kinks-830535: ReLU residuals 0 and 6e-14 from their
kinks and others down to 6e-10; the left quotients -2.32, -2.08, -1.58, then -1.09 three rows
running, all within an allowance of 0.17 to 0.67 while they move by at most one unit of the
loss's last place; the left estimate -2.08 +- 0.58, the sides not told apart, and the central
estimate failed a correct 7.25, the slope of the 3e-14 sliver between the two kinks at the
point).

So, for coordinates that the ladders failed, the rounding is measured along the coordinate
(:func:`.steep_noise.measured_rounding`, 33 calls each: rows at the point and SPAN moves on
either side, each move changing the loss by about CHANGE_ULPS units of its last place as the
analytic slope predicts, so that a kink at the point adds about that much to the row); where it
is at most 1/RATIO of the assumed figure, the ladders judge the coordinate again with it, on
the same pairs (and any new ones) carrying that rounding for moves up to the ladder's first
step. A failure stands only where that judgment fails too; elsewhere its kink or undecided
verdict is taken (a pass becomes undecided: the failure was seen on the assumed figure, and
the second look off the point decides), unless they are left undecided for rounding alone
(they cannot speak there: the failure stands). The most decisive failures go first, in BATCHES, until
one stands (the tensor fails on it) or MEASURED were taken: a buggy tensor pays for one.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from .own_judged import OwnRounding, renoised_taken, with_own
from .probe import TensorProbe
from .refine import Taken
from .steep_noise import CHANGE_ULPS, measured_rounding
from .verdict import NOISE, SIGNIFICANCE, UNSETTLED, Judged, most_decisive

MEASURED = 32  # failed coordinates per tensor measured at most
BATCHES = (1, 1, 2, 4, 8, 16)  # the most decisive first, until a failure stands
RATIO = 2.0  # the measured rounding is used where it is at most half the assumed figure
SPAN = 64.0  # the measured rows lie this many natural moves from the point
SPACINGS = 8.0  # a natural move is at least this many spacings of x (the rows' moves then at least one)
JUMP_UNITS = 12.0  # the jump test's step: a jump of the failure's size is this many one-sided roundings


def failures_on_measured_rounding(
    probe: TensorProbe, flat: np.ndarray, judged: Judged, start: np.ndarray, taken: list[Taken],
    judge: Callable[[TensorProbe, np.ndarray, np.ndarray, list[Taken]], Judged],
) -> Judged:
    """``judged`` (verdicts of the coordinates ``flat``, whose ladders started at ``start``)
    with float64 failures withheld where the ladders, judged again by ``judge(probe, flat,
    start, taken)`` on the rounding measured along each coordinate, do not fail them. The
    failures are taken the most decisive first, in batches of BATCHES, until one stands (the
    tensor fails on it; the rest keep their verdicts) or MEASURED were taken."""
    if probe.compute_dtype != np.dtype(np.float64) or probe.narrow is not None or probe.own_code is not None:
        return judged
    failed = np.flatnonzero(judged.status == FAIL)
    if failed.size == 0:
        return judged
    order = most_decisive(probe, flat, judged, failed)[:MEASURED]
    done = 0
    for size in BATCHES:
        batch = order[done:done + size]
        done += batch.size
        if batch.size == 0:
            break
        judged, stood = _again(probe, flat, judged, batch, start, taken, judge)
        if stood:
            break
    return judged


def _again(
    probe: TensorProbe, flat: np.ndarray, judged: Judged, failed: np.ndarray, start: np.ndarray,
    taken: list[Taken], judge: Callable[[TensorProbe, np.ndarray, np.ndarray, list[Taken]], Judged],
) -> tuple[Judged, bool]:
    """:func:`failures_on_measured_rounding` on the failed positions ``failed``: the verdicts,
    and whether a failure stood (on the assumed rounding where none was measured below it)."""
    where = flat[failed]
    widest = start[failed]
    # Moves that change the loss by a couple of units of its last place (as the analytic slope
    # predicts): the rows measured lie within SPAN such moves of the point and of either side
    # of it, where a kink close to the point adds at most about that much to them.
    # ... and moves the params' grid resolves (the row's points at least a spacing of x apart).
    # A slope of 0 under a large loss makes these moves overflow to inf: the widest step bounds them.
    grid = SPACINGS * np.spacing(np.abs(probe.x[where].astype(np.float64)))
    with np.errstate(over="ignore", divide="ignore"):
        natural = CHANGE_ULPS * probe.eps * max(abs(probe.f0), 1e-300) / np.maximum(np.abs(probe.a[where]), 1e-300)
        moves = np.minimum(widest, SPAN * np.maximum(natural, grid))
    rounding = measured_rounding(probe, where, moves)
    assumed = probe.loss_noise(np.full(where.size, probe.f0))
    with np.errstate(invalid="ignore"):
        smaller = np.isfinite(rounding) & (RATIO * rounding <= assumed)
    if not smaller.all():
        return judged, True
    own = {int(k): (float(r), float(w)) for k, r, w in zip(where, rounding, widest)}
    view = with_own(probe, own)
    again = renoised_taken(taken, own, probe.eps)
    redo = judge(view, where, widest, again)
    # Undecided for rounding alone says nothing against the failure: the ladders cannot speak
    # there (a steep coordinate the chain on measured rounding failed, steep-720310).
    silent = (redo.status == INCONCLUSIVE) & np.array([r == NOISE for r in redo.reasons], dtype=bool)
    withheld = np.flatnonzero((redo.status != FAIL) & ~silent
                               & _jump_seen(view, where, widest, redo, judged.estimate.value[failed]))
    if withheld.size:
        mine = redo.pick(withheld)
        status = np.where(mine.status == PASS, INCONCLUSIVE, mine.status).astype(mine.status.dtype)
        reasons = tuple(UNSETTLED if s == INCONCLUSIVE and r is None else r
                        for s, r in zip(status.tolist(), mine.reasons))
        judged = judged.merged(failed[withheld], Judged(status, mine.estimate, reasons, mine.noise_limited))
    return judged, withheld.size < failed.size


def _jump_seen(view: OwnRounding, where: np.ndarray, widest: np.ndarray, redo: Judged,
               before: np.ndarray) -> np.ndarray:
    """Per coordinate: not a kink verdict, or one a jump at the point bears out. The kink
    logic reads corners crossed among the steps (f'' jumps, f' continuous: a Huber loss's) as
    kinks too, and on the measured rounding it sees more of them: a kink verdict withholds
    the failure only where one pair, at the step where the measured rounding leaves a jump of
    the failure's size (the analytic value's distance from ``before``, the estimate it failed
    on) plain (JUMP_UNITS of its one-sided rounding), shows the one-sided quotients apart
    beyond SIGNIFICANCE times twice their rounding and the threshold (test_grounds: Huber
    corners 3.9e-8 either side of the point, a value 1e-4 off)."""
    out = np.ones(where.size, dtype=bool)
    kinked = np.flatnonzero(redo.status == KINK)
    if kinked.size == 0:
        return out
    f = where[kinked]
    a = view.a[f]
    rounding = np.array([view.rounding[int(k)][0] for k in f])
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        step = np.minimum(JUMP_UNITS * 2.0 * rounding / np.abs(a - before[kinked]), widest[kinked] / 16.0)
    step = np.where(np.isfinite(step) & (step > 0), step, widest[kinked] / 16.0)
    p = view.pairs(f, step)
    right, left = p.sides(view.f0)
    noise = 2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)
    with np.errstate(invalid="ignore"):
        out[kinked] = np.abs(right - left) > SIGNIFICANCE * 2.0 * noise + view.tolerance(f, a)
    return out


__all__ = ["failures_on_measured_rounding"]
