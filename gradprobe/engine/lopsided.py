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

from ..common.status import FAIL, INCONCLUSIVE, KINK
from .kink_evidence import between, crossed
from .kinks import LOPSIDED, sides_differ
from .kinks_at_point import NEAR_SAFETY, RESOLVED_SPACINGS, tiny_reading
from .ladder import Estimate
from .probe import TensorProbe
from .refine import TINY_NOISE_UNITS, Ladder, Tiny
from .verdict import NEAR_KINK, SIGNIFICANCE, UNRESOLVED, Judged, verdicts

CURVATURE_SLACK = 0.01  # the tiny step's quotients may leave the settled side by 1% of the jump
# Kinks at the point that put a value D off the settled side have jumps of D at least; where
# the tiny step shows their net jump within this share of D, they would have to cancel that
# closely, which is not taken as chance (module's note).
CANCEL = 0.01
AGAIN = 4.0  # the second tiny pair's step, this many times the first's


def kink_beside(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """``judged`` (the verdicts of ``ladder`` at ``flat``) with its kinks on one settled side
    looked at with a tiny step (module's note): where the loss is smooth at that step with
    the settled side's slope, that side's estimate judges the coordinate (one pair each)."""
    settled_left, settled_right, side = _settled(probe, flat, ladder)
    crossed_left, crossed_right = crossed(ladder)
    # The settled side crossed no kink among the steps (else kinks crowd the point on both
    # sides, and what a tiny step shows of them need not be the derivative at the point).
    one = (judged.status == KINK) & ((settled_left & ~crossed_left) ^ (settled_right & ~crossed_right))
    differ = sides_differ(probe, flat, ladder)
    one[differ] = False  # judged on a tiny pair already
    joined = _joined(probe, ladder, side, settled_left)
    tiny = _tiny(probe, flat, ladder, side, np.flatnonzero(one))
    if tiny is not None:
        which, side_w, jump, right_q, left_q, noise = tiny
        at_side, together, seen = _smooth(side_w, jump, right_q, left_q, noise)
        off = np.abs(probe.a[flat[which]] - side_w.value)
        smooth = at_side & (joined[which] | together)
        again = np.flatnonzero(smooth & ~joined[which])  # the tiny pair alone: borne out at a wider one?
        if again.size:
            # The tiny step's rounding can be coarser than 1% of D where it sits at the room's
            # floor, a few thousand spacings of a small x (steep-440226: a bend of sharpness 1e4
            # beside the point, the tiny step's rounding 0.2 against a D of 12; the wider pair's
            # 0.05): the CANCEL test may be met at either step (:func:`_borne_out`).
            smooth[again] = _borne_out(probe, flat, ladder, side, which[again], seen[again], off[again])
        k = np.flatnonzero(smooth)
        if k.size:
            judged = _judged_by_side(probe, flat, judged, which[k], side_w.pick(k), right_q[k], left_q[k], noise[k])
    return judged


def _borne_out(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, side: Estimate, which: np.ndarray,
               seen: np.ndarray, off: np.ndarray) -> np.ndarray:
    """Per position ``which``, whose tiny pair showed the loss smooth with ``side``'s slope
    (its gap plus rounding ``seen``): the pair AGAIN times wider does too, and one of the two
    agrees within CANCEL of the value's distance ``off`` from the side, so kinks at the point
    would have to cancel at both steps, and to 1% at one, to give the value."""
    smooth, seen_again = _again(probe, flat, ladder, side, which)
    with np.errstate(invalid="ignore"):
        return smooth & ((seen <= CANCEL * off) | (seen_again <= CANCEL * off))


def _judged_by_side(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, side: Estimate,
                    right_q: np.ndarray, left_q: np.ndarray, noise: np.ndarray) -> Judged:
    """``judged`` with positions ``which`` judged by ``side``, as far as the tiny step's
    quotients ``right_q`` and ``left_q`` (rounding ``noise``) confirm it."""
    confirmed = np.maximum(np.abs(right_q - side.value), np.abs(left_q - side.value)) + noise
    estimate = Estimate(side.value, np.maximum(side.error, confirmed))
    status = verdicts(probe, probe.a[flat[which]], estimate, probe.tolerance(flat[which], estimate.value))
    reasons = tuple(NEAR_KINK if s == INCONCLUSIVE else None for s in status)
    return judged.merged(which, Judged(status, estimate, reasons, np.zeros(which.size, dtype=bool)))


def _smooth_again(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, side: Estimate,
                  which: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Per position ``which``: a second pair, AGAIN times the tiny step, shows the loss smooth
    too (both quotients at the side's value, their gap plus rounding within ``allowed``).
    Kinks within the tiny step whose jumps cancel at one step by chance (kinks-130108: one at
    the point, one 8e-12 beside it, crossed partly, a net gap of 4e-5 against jumps of 0.014
    and 0.023) do not at another: the share of a kink beside the point that a step crosses
    changes with the step."""
    smooth, seen = _again(probe, flat, ladder, side, which)
    with np.errstate(invalid="ignore"):
        return smooth & (seen <= allowed)


def _again(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, side: Estimate,
           which: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per position ``which``, at a pair AGAIN times the tiny step: both quotients at the
    side's value and together (:func:`_smooth`), and their gap plus rounding (inf where no
    pair fits)."""
    smooth, seen = np.zeros(which.size, dtype=bool), np.full(which.size, np.inf)
    tiny = _tiny(probe, flat, ladder, side, which, AGAIN)
    if tiny is None:
        return smooth, seen
    there, side_w, jump, right_q, left_q, noise = tiny
    at, = np.nonzero(np.isin(which, there))
    at_side, together, seen[at] = _smooth(side_w, jump, right_q, left_q, noise)
    smooth[at] = at_side & together
    return smooth, seen


def _smooth(side: Estimate, jump: np.ndarray, right_q: np.ndarray, left_q: np.ndarray,
            noise: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What a tiny pair shows of the loss: both quotients at the side's value (within
    SIGNIFICANCE of its bound and their rounding, plus CURVATURE_SLACK of the jump), its two
    quotients together to one bound of their rounding (plus that slack), and their gap plus
    that bound."""
    with np.errstate(invalid="ignore", over="ignore"):
        reach = SIGNIFICANCE * (side.error + noise) + CURVATURE_SLACK * jump
        at_side = (np.abs(right_q - side.value) <= reach) & (np.abs(left_q - side.value) <= reach)
        gap = np.abs(right_q - left_q)
        return at_side, gap <= noise + CURVATURE_SLACK * jump, gap + noise


def settled_failures(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """Failures of ``ladder``'s verdicts ``judged`` (:func:`.kinks.judge_ladder`, every
    ladder's) judged by a settled side, undecided where the
    tiny step's quotient on that side leaves it: a side also settles where a kink lies closer
    to the point than its smallest step (its quotients then miss the slope beyond the kink by
    the jump times distance / step, too little to see at the ladder's steps), and its value
    is the slope beyond that kink, not the derivative here (kinks-110040: an absolute value's
    corner 6.5e-14 from the point, every step above 1e-10, the settled side off by 1,846);
    and where the tiny step's own two sides differ (a kink within it)."""
    settled_left, settled_right, side = _settled(probe, flat, ladder)
    differ = sides_differ(probe, flat, ladder)
    on_side = (settled_left ^ settled_right) & (judged.status == FAIL) & (judged.estimate.value == side.value)
    on_side[differ] = False
    return _held_by_tiny_pair(probe, flat, ladder, judged, np.flatnonzero(on_side), settled_left, side)


def alone_failures(probe: TensorProbe, flat: np.ndarray, judged: Judged, left: Estimate, right: Estimate,
                   smallest: np.ndarray) -> Judged:
    """Failures of ``judged`` (each side taken apart, :func:`.sides_apart.judge_sides_apart`,
    on steps from ``smallest``) that one side decided alone, the other not: as a settled
    side's (:func:`settled_failures`), kept only where a tiny step's quotient on that side
    holds its value and the step's own sides agree, else undecided. The side that decided
    alone is the slope beside a kink, not the derivative at one at the point (kinks-240855:
    an absolute value's residual at 0 and another 1e-10 beside it, the left side -1.073 alone,
    a correct -1.707 between it and the right side at the point, -2.341)."""
    tol = probe.tolerance(flat, probe.a[flat])  # as judge_sides_apart decides a side
    decides_left, decides_right = NEAR_SAFETY * left.error <= tol, NEAR_SAFETY * right.error <= tol
    alone = (decides_left ^ decides_right) & (judged.status == FAIL)
    which = np.flatnonzero(alone)
    if which.size == 0:
        return judged
    side = Estimate(np.where(decides_left, left.value, right.value),
                    NEAR_SAFETY * np.where(decides_left, left.error, right.error))
    sides = Ladder(Estimate.better(left, right), left, right, np.zeros(flat.size), smallest)
    return _held_by_tiny_pair(probe, flat, sides, judged, which, decides_left, side)


def moved_kinks(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged, tiny: Tiny | None) -> Judged:
    """``judged`` with its kinks where the ladder's sides differ, the tiny step moved the jump
    (one side clean, the other moved onto it, the step's two quotients together: a kink
    beside the point, :func:`.kinks_at_point.judge_sides`) and the value lies between the
    ladder's sides, judged by the clean side where the loss is shown smooth with its slope:
    at the tiny step, and at a pair AGAIN times wider whose quotients agree to within CANCEL
    of the value's distance D from that side. A value between the sides is a kink's only if
    kinks at the point cancel at both steps, to 1% of D at one of them; beside the point the
    clean side is the derivative, and a value off it is a bug (kinks-250047: a Huber piece
    taken for the other, its corner 1.25e-5 beside the point, every ladder step beyond it:
    the far side's value, once reported as a kink)."""
    which = sides_differ(probe, flat, ladder)
    if tiny is None or which.size == 0:
        return judged
    left, right = ladder.left.pick(which), ladder.right.pick(which)
    jump = np.abs(right.value - left.value)
    noise = tiny.one_sided_noise
    kept, clean_left, clean_right = tiny_reading(tiny, left, right)
    side = Estimate(np.where(clean_left, left.value, right.value),
                    NEAR_SAFETY * np.where(clean_left, left.error, right.error))
    at_side, together, seen = _smooth(side, jump, tiny.right, tiny.left, noise)
    a = probe.a[flat[which]]
    off = np.abs(a - side.value)
    candidate = ((judged.status[which] == KINK) & ~kept & (clean_left ^ clean_right) & at_side & together
                 & between(a, left, right, probe.tolerance(flat[which], a)))
    k = np.flatnonzero(candidate)
    if k.size == 0:
        return judged
    full = Estimate(np.zeros(flat.size), np.zeros(flat.size))
    full.value[which], full.error[which] = side.value, side.error
    k = k[_borne_out(probe, flat, ladder, full, which[k], seen[k], off[k])]
    if k.size == 0:
        return judged
    return _judged_by_side(probe, flat, judged, which[k], side.pick(k), tiny.right[k], tiny.left[k], noise[k])


def _held_by_tiny_pair(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged, which: np.ndarray,
                       settled_left: np.ndarray, side: Estimate) -> Judged:
    """Failures ``which`` of ``judged`` on ``side`` (the left one where ``settled_left``), kept
    as :func:`settled_failures` says; the others undecided. So too where no tiny step fits
    between RESOLVED_SPACINGS spacings of x and the ladder's smallest step over 16: nothing
    then rules out a kink at the point (kinks-300980: params near 300, the settled side's
    smallest step 7.5e-9, every pair below it within 2**13 spacings; a kink at the point, the
    other side's slope at it 0.00178, a correct value)."""
    if which.size == 0:
        return judged
    tiny = _tiny(probe, flat, ladder, side, which)
    roomless = which if tiny is None else np.setdiff1d(which, tiny[0])
    judged = judged.undecided(roomless, (UNRESOLVED,) * roomless.size)
    if tiny is None:
        return judged
    which, side_w, jump, right_q, left_q, noise = tiny
    mine = np.where(settled_left[which], left_q, right_q)
    tol = probe.tolerance(flat[which], probe.a[flat[which]])
    with np.errstate(invalid="ignore", over="ignore"):
        holds = np.abs(mine - side_w.value) <= SIGNIFICANCE * (side_w.error + noise) + CURVATURE_SLACK * jump
        # A kink within the tiny step, at the point or closer than any step may tell (the pair
        # goes no lower than RESOLVED_SPACINGS spacings of x), where a value off the settled
        # side by D can be a kink's: seen as the step's own sides apart, or not ruled out where
        # kinks with jumps of D would only have to cancel to within CANCEL of D to hide in what
        # that pair resolves (kinks-110191: absolute values' corners at 0 and 1,500 spacings of x
        # either side, jumps of 4.87 and -4.90, D 0.127 against a gap of 0.005 within 0.003).
        gap = np.abs(right_q - left_q)
        off = np.abs(probe.a[flat[which]] - side_w.value)
        apart = (gap > 2.0 * SIGNIFICANCE * noise + tol) | (gap + noise > CANCEL * off)
    # As for a kink taken off the point: kinks within the tiny step whose jumps cancel there
    # by chance do not at a wider one.
    stands = np.flatnonzero(holds & ~apart)
    if stands.size:
        again = _smooth_again(probe, flat, ladder, side, which[stands], CANCEL * off[stands])
        apart[stands[~again]] = True
    beyond, within = which[~holds & ~apart], which[apart]
    judged = judged.undecided(beyond, (NEAR_KINK,) * beyond.size)
    return judged.undecided(within, (UNRESOLVED,) * within.size)


def clean_side_failures(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """Failures of ``judged`` where the ladder's sides differ, judged by the tiny step
    (:func:`.kinks_at_point.judge_sides`: the clean side where the other moved to it, so the
    kink lay beside the point; the tiny step's own central quotient where both moved), kept
    only where a pair AGAIN times wider shows the loss smooth with that slope too; else
    undecided (UNRESOLVED). Kinks at the point can be cancelled at the tiny step by one
    beside it that the step crosses in part, by chance (kinks-221142: ReLU ties at the point,
    a net jump of 0.0014, and a residual 3.1e-14 beside it, a jump of -0.0017, three quarters
    crossed at 1.3e-13); the share crossed changes with the step. And a tiny step a few
    thousand spacings of x wide can read both sides alike where the code's own rounding of
    its residuals decides what it sees (kinks-340214: sides of -0.00867 and -0.00726 down to
    2.3e-13, both -0.00588 at 2.8e-14)."""
    differ = np.zeros(flat.size, dtype=bool)
    differ[sides_differ(probe, flat, ladder)] = True
    which = np.flatnonzero(differ & (judged.status == FAIL))
    if which.size == 0:
        return judged
    side = judged.estimate
    smooth = _smooth_again(probe, flat, ladder, side, which, np.full(which.size, np.inf))
    gone = which[~smooth]
    return judged.undecided(gone, (UNRESOLVED,) * gone.size)


def _settled(probe: TensorProbe, flat: np.ndarray, ladder: Ladder) -> tuple[np.ndarray, np.ndarray, Estimate]:
    """Where the left or the right side settled (its bound LOPSIDED of the other's) and that
    side's estimate, its bound taken NEAR_SAFETY times wider (as :func:`.kinks.judge_ladder`
    takes it)."""
    left, right = ladder.left, ladder.right
    tol = probe.tolerance(flat, 0.5 * (left.value + right.value))
    settled_left = (left.error < LOPSIDED * right.error) & (right.error > tol)
    settled_right = (right.error < LOPSIDED * left.error) & (left.error > tol)
    side = Estimate(np.where(settled_left, left.value, right.value),
                    NEAR_SAFETY * np.where(settled_left, left.error, right.error))
    return settled_left, settled_right, side


def _tiny(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, side: Estimate, which: np.ndarray,
          wider: float = 1.0):
    """A pair per position ``which`` at the smallest step at which rounding leaves the sides'
    jump plain to see (as tiny_pair's), yet RESOLVED_SPACINGS spacings of x at least and 16
    times below the ladder's smallest (that step ``wider`` times wider, within the same room,
    or as many times narrower where that room ends: a second pair at another step, never the
    same one, kinks-381008): (positions with room for it, their side estimates, jumps, right
    and left quotients, the quotients' rounding), or None."""
    if which.size == 0:
        return None
    left, right = ladder.left, ladder.right
    jump = np.abs(np.nan_to_num((right.value - left.value)[which]))
    lowest = 2.0 * RESOLVED_SPACINGS * probe.resolution(flat[which])
    highest = ladder.smallest[which] * 2.0**-4
    room = (lowest < highest) & np.isfinite(side.value[which])
    which, jump, lowest, highest = which[room], jump[room], lowest[room], highest[room]
    if which.size == 0:
        return None
    visible = TINY_NOISE_UNITS * probe.loss_noise(np.full(which.size, probe.f0)) / np.maximum(jump, 1e-300)
    step = np.clip(visible, lowest, highest)
    if wider != 1.0:
        step = np.where(wider * step <= highest, wider * step, step / wider)
        fits = step >= lowest
        which, jump, step = which[fits], jump[fits], step[fits]
        if which.size == 0:
            return None
    p = probe.pairs(flat[which], step)
    right_q, left_q = p.sides(probe.f0)
    noise = 2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)
    return which, side.pick(which), jump, right_q, left_q, noise


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
