"""A failure judged on the tiny step's reading stands only where a step a quarter as long
reads the same.

Where the ladder's one-sided derivatives differ, a pair at a tiny step tells a kink at the
point from one beside it (:mod:`.kinks_at_point`): a side whose tiny quotient still sits at
its ladder value is clean, and judges the coordinate as far as that quotient confirms it
(or, with both sides clean, the tiny central quotient does). That reading takes the tiny
step to lie within the loss's smooth range, its truncation negligible. Corners (jumps of
f'' only) a step or two away can leave it far from the derivative while the two tiny sides
agree with each other and with a side's extrapolation (kinks-591166: Huber corners beside
the point, one-sided extrapolations 2.3e-4 apart with bounds of 1e-5 and 2e-5, the right
side confirmed at a tiny step of 7.6e-6, both 3.9e-4 off the true derivative; quotients
still moving by 2.7e-4 at a quarter of that step).

So one pair at a quarter of the tiny step, per such failure. Its quotient of the same kind
(the side's, or the central one) must tell the analytic value apart on its own (beyond the
tolerance and its rounding); and where it has moved beyond the two quotients' rounding, the
reading was not yet the derivative, and the failure must stand against a bound widened by
SAFETY times that move (a first-order tail: the rest of the way is a third of the move).
Otherwise the coordinate is undecided, and a retry at smaller steps follows.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL
from .ladder import NOISE_UNITS, SAFETY, Estimate
from .probe import TensorProbe
from .refine import Ladder, Tiny
from .verdict import UNSETTLED, Judged, verdicts

QUARTER = 0.25


def tiny_borne_out(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, tiny: Tiny | None,
                   which: np.ndarray, judged: Judged) -> Judged:
    """``judged`` with failures at positions ``which`` (those given the tiny pair ``tiny``)
    that rest on the tiny step's reading kept only where a pair a quarter as long bears it
    out (module's note); the others undecided."""
    if tiny is None or tiny.step is None or which.size == 0:
        return judged
    value = judged.estimate.value[which]
    by_right = value == ladder.right.value[which]
    by_left = ~by_right & (value == ladder.left.value[which])
    by_central = ~by_right & ~by_left & (value == tiny.central.value)
    pos = np.flatnonzero((judged.status[which] == FAIL) & (by_right | by_left | by_central))
    if pos.size == 0:
        return judged
    k = which[pos]
    p = probe.pairs(flat[k], QUARTER * tiny.step[pos])
    right, left = p.sides(probe.f0)
    quarter = np.where(by_right[pos], right, np.where(by_left[pos], left, p.central))
    before = np.where(by_right[pos], tiny.right[pos], np.where(by_left[pos], tiny.left[pos],
                                                                 tiny.central.value[pos]))
    one_sided = 2.0 * p.noise / np.maximum(p.h_plus, p.h_minus)
    noise = np.where(by_central[pos], 2.0 * p.noise / (p.h_plus + p.h_minus), one_sided)
    with np.errstate(invalid="ignore", over="ignore"):
        move = np.abs(quarter - before)
        moved = move > NOISE_UNITS * (noise + tiny.one_sided_noise[pos])
        widened = Estimate(value[pos], judged.estimate.error[k] + SAFETY * move)
    a = probe.a[flat[k]]
    tol = probe.tolerance(flat[k], value[pos])
    with np.errstate(invalid="ignore"):
        apart = np.abs(a - quarter) > tol + NOISE_UNITS * noise
    withdrawn = ~apart | (moved & (verdicts(probe, a, widened, tol) != FAIL))
    gone = k[withdrawn]
    return judged.undecided(gone, (UNSETTLED,) * gone.size, noise_limited=False) if gone.size else judged
