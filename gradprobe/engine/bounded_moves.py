"""Failures on coordinates that reach the loss only at its rounding level.

A slope moves the loss in proportion to the step. Where the pairs taken on a coordinate show
the loss moving by no more than a bounded amount near its rounding at every step, a small
quotient there says nothing of the slope at the point: a term bounded at that level (a sine
of a steep argument beside a huge loss) moves the loss by that little however far the steps
go, and the linear range the slope lives in lies below every step rounding allows.
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import is_narrow
from ..common.status import FAIL
from .probe import TensorProbe
from .ladder import NOISE_UNITS
from .refine import Taken
from .verdict import BOUNDED, NEVER_MOVED, SIGNIFICANCE, Judged

BOUNDED_SPAN = 16.0  # the steps taken span at least this factor for a move's growth to show
UNMOVED_REACH = 2.0**-30  # a slope first showing above this share of the param's scale can hide


def rounding_only(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with float64 failures undecided where the pairs ``taken`` on the coordinate
    show the loss moving by no more than a bounded amount at its rounding level, while
    backward's slope predicts a change SIGNIFICANCE times that at the widest step: at every
    pair by no more than two values' rounding (though not by exactly nothing at all of them),
    or by no more than SIGNIFICANCE times the ladder's noise allowance (2 NOISE_UNITS values'
    rounding: a move no quotient could tell from rounding with a margin) and, over steps
    spanning BOUNDED_SPAN or more, by no more at the wider steps than at those BOUNDED_SPAN
    times smaller, beyond two values' rounding. A slope moves the loss in proportion to the
    step; a term bounded at the rounding level (a sine of a steep argument beside a huge loss)
    moves it by that little however far the steps go, and a small quotient there says nothing
    of the slope at the point, whose linear range no step resolves (steep-65101: a correct
    slope of 3.7e5 read as 0 +- 9.9e3 beside a loss of 4.9e15, whose last place is 1;
    steep-72373 and steep-73224: sines moving the loss by up to 8 and 4.5 values' rounding
    beside losses of 3e13 and 4e12, read as slopes of 1e4 and 2 against 7e5 and 2e3). A sine
    whose moves rise far above the rounding at the smaller steps shows its linear range there
    and is judged by it; a loss that never changed at all keeps its reading as a zero slope,
    unless backward's slope would first show only at steps where a term may bend back
    (:func:`_hides_a_slope`)."""
    which = np.flatnonzero(judged.status == FAIL)
    if which.size == 0 or not taken or is_narrow(probe.compute_dtype):
        return judged
    coords = np.concatenate([c for c, _, _ in taken])
    up = np.concatenate([np.abs(p.f_plus - probe.f0) for _, _, p in taken])
    down = np.concatenate([np.abs(probe.f0 - p.f_minus) for _, _, p in taken])
    noise = np.concatenate([np.broadcast_to(p.noise, p.f_plus.shape) for _, _, p in taken])
    h = np.concatenate([np.maximum(p.h_plus, p.h_minus) for _, _, p in taken])
    doubted, unmoved = [], []
    for k in which:
        mine = coords == flat[k]
        if not mine.any():
            continue
        u, d, e, step = up[mine], down[mine], noise[mine], h[mine]
        with np.errstate(invalid="ignore", over="ignore"):
            move, pair_rounding = np.maximum(u, d), 2.0 * float(np.max(e))
            within = bool(np.all(move <= 2.0 * e))
            wide = step > float(np.max(step)) / BOUNDED_SPAN
            bounded = bool(wide.any() and not wide.all() and np.all(move <= SIGNIFICANCE * NOISE_UNITS * 2.0 * e)
                           and move[wide].max() <= move[~wide].max() + pair_rounding)
            moved = bool(np.any(move > 0))
            predicted = (abs(float(probe.a[flat[k]])) * float(np.max(step))
                         > SIGNIFICANCE * (float(np.max(move)) + pair_rounding))
        if (within or bounded) and moved and predicted:
            doubted.append(k)
        elif not moved and predicted and _hides_a_slope(probe, flat[k], pair_rounding):
            unmoved.append(k)
    where, still = np.array(doubted, dtype=np.int64), np.array(unmoved, dtype=np.int64)
    judged = judged.undecided(where, (BOUNDED,) * where.size, noise_limited=False)
    return judged.undecided(still, (NEVER_MOVED,) * still.size, noise_limited=False)


def _hides_a_slope(probe: TensorProbe, k: int, pair_rounding: float) -> bool:
    """A loss that did not move at all, at any step taken along coordinate ``k``, could still
    have backward's slope there: it would first move the loss beyond SIGNIFICANCE pair
    roundings at a step ``reach``, and where that lies above UNMOVED_REACH of the param's
    scale (max(1, |x|)), a term that bends back within it (a pole's 1/(1 - u) beside a loss
    of 1.3e18, 1.2e-8 from its pole: a slope of 6.8e8 whose whole term moves the loss by 8,
    against a last place of 256, steep-270370) moves the loss by nothing at every step.
    Below it, the term would have to bend within a few million spacings of x: a slope that
    does not show there is taken as absent (a param the forward ignores, its gradient kept)."""
    with np.errstate(divide="ignore", over="ignore"):
        reach = SIGNIFICANCE * pair_rounding / abs(float(probe.a[k]))
    return bool(reach > UNMOVED_REACH * max(1.0, abs(float(probe.x[k]))))
