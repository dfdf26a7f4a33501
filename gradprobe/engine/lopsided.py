"""A kink verdict read off a ladder with one side settled and the other not: is the kink at
the point, or only within the ladder's steps?

Where one side's quotients settle (a tight bound) and the other's do not, a kink lies within
the steps on that other side, and the settled side is the derivative at the point, unless
the kink is at the point itself. :func:`.kinks.judge_ladder` takes an analytic value between
the two sides as a kink's there (the unsettled side is not known well enough to tell: its
tableau spans rows on both sides of the kink). A pair at a step far below the ladder's (as
:func:`.refine.tiny_pair` chooses it, where the sides settle apart) tells: at the point the
jump stays at that step; beside it both of its one-sided quotients are the settled side's
slope (within the settled side's bound, the tiny step's rounding and CURVATURE_SLACK of the
jump). That alone can be fooled by kinks meeting at the point whose jumps nearly cancel (ReLU
residuals exactly 0 with upstream weights of both signs, kinks-49059: a net jump of 0.39
between jumps of 1 to 3, within three of the tiny step's rounding bounds), so it must be borne
out by one more piece of evidence on the coordinate:

- the ladder's own rows: at its two smallest steps the unsettled side's quotients are the
  settled side's slope (:func:`_joined`): the kink was crossed among the steps and left
  behind (kinks crowding the point keep the sides apart at every step); or
- the tiny step's two quotients agree with each other to one bound of their rounding (plus
  CURVATURE_SLACK of the jump), not three, and that agreement (their gap plus that bound) is
  within CANCEL of the distance D of the analytic value from the settled side: kinks at the
  point that gave the value would have jumps of D at least, cancelling to that share. So
  beside a bend closer than every step of the ladder, which the unsettled side never leaves
  behind (steep-87786: a bend 1.7e-9 beside the point, every step above 1e-8, D 88042 and the
  gap 0 within 0.04); not at ReLU ties within the tiny step (kinks-111135: a residual at 0 and
  one 4,400 spacings of x away, jumps of 0.86 and -1.84, D 0.0105 against a gap of 3e-4
  within a bound of 3e-4).

Then the settled side judges the value: a softplus of sharpness 1e10 whose bend lies 4e-8
beside the point, with a derivative taken from the wrong piece (half the slope), fails.

Only where the tiny step still spans RESOLVED_SPACINGS spacings of x: a kink closer than
that to the point is one the code's own rounding of a residual can place on either side.
"""

from __future__ import annotations

import numpy as np

from ..common.status import INCONCLUSIVE, KINK
from .kink_evidence import crossed
from .kinks import LOPSIDED, sides_differ
from .kinks_at_point import NEAR_SAFETY, RESOLVED_SPACINGS
from .ladder import Estimate
from .probe import TensorProbe
from .refine import TINY_NOISE_UNITS, Ladder
from .verdict import NEAR_KINK, SIGNIFICANCE, Judged, verdicts

CURVATURE_SLACK = 0.01  # the tiny step's quotients may leave the settled side by 1% of the jump
# Kinks at the point that put a value D off the settled side have jumps of D at least; where
# the tiny step shows their net jump within this share of D, they would have to cancel that
# closely, which is not taken as chance (module's note).
CANCEL = 0.01


def kink_beside(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """``judged`` (the verdicts of ``ladder`` at ``flat``) with its kinks on one settled side
    looked at with a tiny step (module's note): where the loss is smooth at that step with
    the settled side's slope, that side's estimate judges the coordinate (one pair each)."""
    left, right = ladder.left, ladder.right
    tol = probe.tolerance(flat, 0.5 * (left.value + right.value))
    settled_left = (left.error < LOPSIDED * right.error) & (right.error > tol)
    settled_right = (right.error < LOPSIDED * left.error) & (left.error > tol)
    crossed_left, crossed_right = crossed(ladder)
    # The settled side crossed no kink among the steps (else kinks crowd the point on both
    # sides, and what a tiny step shows of them need not be the derivative at the point).
    one = (judged.status == KINK) & ((settled_left & ~crossed_left) ^ (settled_right & ~crossed_right))
    one[sides_differ(probe, flat, ladder)] = False  # judged on a tiny pair already
    side = Estimate(np.where(settled_left, left.value, right.value),
                    NEAR_SAFETY * np.where(settled_left, left.error, right.error))
    joined = _joined(probe, ladder, side, settled_left)
    which = np.flatnonzero(one)
    if which.size == 0:
        return judged
    side = side.pick(which)
    jump = np.abs(np.nan_to_num((right.value - left.value)[which]))
    # The smallest step at which rounding leaves the jump plain to see (as tiny_pair's), yet
    # RESOLVED_SPACINGS spacings of x at least, and 16 times below the ladder's smallest.
    lowest = 2.0 * RESOLVED_SPACINGS * probe.resolution(flat[which])
    highest = ladder.smallest[which] * 2.0**-4
    room = (lowest < highest) & np.isfinite(side.value)
    which, side, jump = which[room], side.pick(np.flatnonzero(room)), jump[room]
    joined = joined[which]
    if which.size == 0:
        return judged
    visible = TINY_NOISE_UNITS * probe.loss_noise(np.full(which.size, probe.f0)) / np.maximum(jump, 1e-300)
    p = probe.pairs(flat[which], np.clip(visible, lowest[room], highest[room]))
    right_q, left_q = p.sides(probe.f0)
    noise = 2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)
    with np.errstate(invalid="ignore", over="ignore"):
        reach = SIGNIFICANCE * (side.error + noise) + CURVATURE_SLACK * jump
        smooth = (np.abs(right_q - side.value) <= reach) & (np.abs(left_q - side.value) <= reach)
        gap = np.abs(right_q - left_q)
        off = np.abs(probe.a[flat[which]] - side.value)
        smooth &= joined | ((gap <= noise + CURVATURE_SLACK * jump) & (gap + noise <= CANCEL * off))
    k = np.flatnonzero(smooth)
    if k.size == 0:
        return judged
    # The settled side, as far as the tiny step's quotients confirm it.
    confirmed = np.maximum(np.abs(right_q - side.value), np.abs(left_q - side.value)) + noise
    estimate = Estimate(side.value[k], np.maximum(side.error, confirmed)[k])
    a = probe.a[flat[which[k]]]
    status = verdicts(probe, a, estimate, probe.tolerance(flat[which[k]], estimate.value))
    reasons = tuple(NEAR_KINK if s == INCONCLUSIVE else None for s in status)
    again = Judged(status, estimate, reasons, np.zeros(k.size, dtype=bool))
    return judged.merged(which[k], again)


def _joined(probe: TensorProbe, ladder: Ladder, side: Estimate, settled_left: np.ndarray) -> np.ndarray:
    """Per coordinate: the unsettled side's quotients at the ladder's two smallest steps are
    the settled side's ``side`` (within SIGNIFICANCE times its bound and their rounding, plus
    twice what the settled side's own quotient there leaves its estimate by: the curvature
    at that step): the kink that kept that side from settling was crossed among the steps
    and left behind, and both sides agree below it. Kinks crowding the point leave the sides
    apart at every step."""
    assert ladder.pairs is not None
    n = ladder.smallest.size
    rows = ladder.pairs.f_plus.size // n
    if rows < 2:
        return np.zeros(n, dtype=bool)
    right_q, left_q = (q.reshape(rows, n)[-2:] for q in ladder.pairs.sides(probe.f0))
    noise = 2.0 * ladder.pairs.noise.reshape(rows, n)[-2:] / np.minimum(
        ladder.pairs.h_plus, ladder.pairs.h_minus).reshape(rows, n)[-2:]
    mine = np.where(settled_left, left_q, right_q)
    other = np.where(settled_left, right_q, left_q)
    with np.errstate(invalid="ignore", over="ignore"):
        reach = SIGNIFICANCE * (side.error + noise) + 2.0 * np.abs(mine - side.value)
        return np.all(np.abs(other - side.value) <= reach, axis=0)
