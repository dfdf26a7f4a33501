"""Verdicts from one-sided derivatives: a loss smooth at the point, a corner, or a kink at or
near it.

A ladder (:mod:`.refine`) gives each coordinate a central estimate and its left and right
derivatives extrapolated each on its own. Where the sides agree, the loss is smooth or has a
corner (only f'' jumps) and the central estimate or the sides' mean decides. Where they differ
beyond their bounds and the threshold, a pair at a much smaller step tells a kink at the point
(the jump stays) from one near it (the jump moves, and the clean side's derivative is the
derivative here; :mod:`.kinks_at_point`). A kink verdict needs that evidence: the sides seen to differ, and the
analytic value one a kink between them could give. A value off sides that agree with each
other, or that are not known well enough to tell, is a failure or undecided, never a kink.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from .ladder import Estimate
from .probe import TensorProbe
from .refine import Ladder, Tiny
from .kinks_at_point import NEAR_SAFETY, judge_sides
from .kink_evidence import between, cornered, crossed, kink_evidence, near_a_side, within_kink
from .verdict import CORNER_NEAR, CROWDED, NEAR_KINK, NOISE, SIGNIFICANCE, UNSETTLED, Judged, verdicts

LOPSIDED = 0.01  # a side whose bound is 100 times tighter than the other's has settled


def _sides_apart(probe: TensorProbe, flat: np.ndarray, ladder: Ladder) -> tuple[np.ndarray, np.ndarray]:
    """Where the one-sided derivatives differ beyond their bounds and the threshold, and the
    tolerance at their mean."""
    left, right = ladder.left, ladder.right
    tol_sides = probe.tolerance(flat, 0.5 * (left.value + right.value))
    return np.abs(right.value - left.value) > SIGNIFICANCE * (left.error + right.error) + tol_sides, tol_sides


def sides_differ(probe: TensorProbe, flat: np.ndarray, ladder: Ladder) -> np.ndarray:
    """Positions in ``flat`` whose one-sided derivatives differ: a kink at the point or near
    it, which :func:`judge_ladder` tells apart with a pair at a tiny step
    (:func:`.refine.tiny_pair`, given the jump ``right - left``)."""
    return np.flatnonzero(_sides_apart(probe, flat, ladder)[0])


def judge_ladder(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, tiny: Tiny | None) -> Judged:
    """Verdicts from a ladder's central and one-sided estimates (kinks and corners
    included). ``tiny``: the tiny-step pair of the coordinates :func:`sides_differ` names
    (None when it names none). Pure: judging spends no evaluations."""
    a = probe.a[flat]
    left, right = ladder.left, ladder.right
    mid = 0.5 * (left.value + right.value)
    differ, tol_sides = _sides_apart(probe, flat, ladder)
    # Smooth, or a corner where only f'' jumps: the sides agree, and their mean is an
    # estimate of f' that the central tableau (which assumes even powers of h) may not reach.
    # Neither that mean nor the central quotients (the sides' mean at every row) is known
    # closer than the sides' first-order extrapolations agree (:mod:`.sides_gap`).
    apart = ladder.sides_apart_by if ladder.sides_apart_by is not None else np.zeros(a.shape)
    corner = Estimate(mid, np.maximum(np.maximum(left.error, right.error) + 0.5 * np.abs(right.value - left.value),
                                      apart))
    central = _central_where_sides_agree(ladder)
    best = Estimate.better(central, corner)
    status = verdicts(probe, a, best, probe.tolerance(flat, best.value))
    # A failure on the central tableau where the sides' gap took both signs (kinks or corners
    # crossed within the steps, :mod:`.sides_gap`) does not stand on it: its smooth model
    # does not hold there. The sides' mean judges it, as where the sides were not steady.
    turned = ladder.gap_turned if ladder.gap_turned is not None else np.zeros(a.shape, dtype=bool)
    void = (status == FAIL) & turned & (central.error <= corner.error)
    if void.any():
        central = Estimate(central.value, np.where(void, np.inf, central.error))
        best = Estimate.better(central, corner)
        status = verdicts(probe, a, best, probe.tolerance(flat, best.value))
    # The sides' mean is f' where f'' jumps at the point; where it jumps anywhere within the
    # smallest step it may be off by the jump times that step: a failure on the mean must
    # stand that too (a pass on it, as before, takes the corner at the point).
    by_corner = corner.error < central.error
    on_mean = np.flatnonzero(by_corner)
    withheld = np.zeros(flat.size, dtype=bool)
    withheld[list(_corner_withheld(probe, flat, ladder, on_mean, corner.pick(on_mean), status))] = True
    # Sides too uncertain to be told apart, yet further apart than the central bound: at a
    # kink the central quotients are the sides' mean, whatever their tableau's bound says,
    # so a value the kink could explain is not a bug on this evidence (a second look off
    # the point decides, see offpoint.py).
    gap = np.abs(right.value - left.value)
    tol_a = probe.tolerance(flat, a)
    # A side with no trusted entry (an infinite bound), where the gap between the sides is seen
    # (above the noise) to vanish with the step as a smooth loss's does, shows no kink: the
    # side merely converges slowly. Two sides with bounds that lie apart still suggest one.
    vanish = ladder.sides_vanish if ladder.sides_vanish is not None else np.zeros(a.shape, dtype=bool)
    smooth = vanish & ~(np.isfinite(left.error) & np.isfinite(right.error))
    # Judged by the central estimate as if it could be trusted: where the sides voided it, the
    # kink they suggest is the verdict too (so the second look off the point checks it).
    raw = Estimate.better(ladder.central, corner)
    raw_fails = verdicts(probe, a, raw, probe.tolerance(flat, raw.value)) == FAIL
    unresolved = (~differ & ~smooth & (gap > SIGNIFICANCE * raw.error) & (gap > tol_a) & raw_fails
                  & (status != PASS))
    # Yet the sides are not seen to differ beyond their bounds. Where their quotients crossed
    # kinks among the steps and their values lie apart beyond the tighter bound (a finite one),
    # the threshold and what a corner within the steps could make of them (:func:`cornered`),
    # the kinks are seen, and explain what :func:`within_kink` allows with that bound;
    # elsewhere a kink is not shown, and a value one side could give is undecided (a value
    # off both sides, beyond their bounds, keeps its verdict).
    crossed_left, crossed_right = crossed(ladder)
    tighter = np.minimum(left.error, right.error)
    tighter = np.where(np.isfinite(tighter), tighter, 0.0)
    apart_seen = (crossed_left | crossed_right) & (gap > SIGNIFICANCE * tighter + tol_a + cornered(ladder))
    seen = apart_seen & within_kink(a, Estimate(left.value, tighter), Estimate(right.value, tighter), tol_a)
    status[unresolved & seen] = KINK
    status[unresolved & ~seen & between(a, left, right, tol_a) & near_a_side(a, left, right, tol_a)] = INCONCLUSIVE
    # Kinks seen, yet the value lies outside every value one kink between the sides could
    # give: several meeting at the point beside a smooth part can give it (as where the sides
    # are told apart, :func:`.kinks_at_point.judge_sides`), and the steps crossed more. Not
    # evidence of a bug; the second look off the point decides (kinks-300172: absolute values'
    # residuals at 0 and at every distance down to 1e-12, sides 3.67 +- 0.81 and 4.98 +- 0.11
    # at steps of 1e-11 and below, a correct -1.41).
    kinks_outside = ~differ & ~smooth & apart_seen & ~seen & (gap > tol_a) & (status == FAIL)
    status[kinks_outside] = INCONCLUSIVE
    # The sides' mean stands for f' where only f'' jumps at the point; where either side's
    # quotients crossed kinks among the steps (or the gap between them took both signs),
    # more can lie closer than any step, and a failure judged by that mean is not evidence
    # of a bug.
    crowded = (status == FAIL) & by_corner & (crossed_left | crossed_right | turned)
    status[crowded] = INCONCLUSIVE
    crowded |= kinks_outside
    # Rounding limits the decision only where the bound it makes up is too wide to decide
    # at the threshold; a decisive bound left undecided by the sides asks for smaller steps
    # (where they resolve), not wider ones (steep-461145: u**7 steep at 1e8, its sides'
    # curvature terms 1e12 at the ladder's steps, the central bound 2.8).
    decisive = SIGNIFICANCE * best.error <= probe.tolerance(flat, best.value)
    noisy = (ladder.noise_share > 0.5) & ~decisive
    reasons: list[str | None] = [
        (CROWDED if crowded[k] else CORNER_NEAR if withheld[k] else NOISE if noisy[k] else UNSETTLED)
        if status[k] == INCONCLUSIVE else None
        for k in range(flat.size)
    ]
    value, error = best.value.copy(), best.error.copy()
    # One side settles and the other does not: a kink lies within the steps on that other
    # side, not at the point, and the settled side's derivative is the derivative here.
    settled_left = (left.error < LOPSIDED * right.error) & (right.error > tol_sides)
    settled_right = (right.error < LOPSIDED * left.error) & (left.error > tol_sides)
    # The central tableau is not to be trusted there, unless it settled more tightly than that
    # side and agrees with it: then the other side merely converges slowly (a smooth loss
    # whose one-sided expansion starts late), and nothing points at a kink.
    settled = Estimate(np.where(settled_left, left.value, right.value),
                       np.where(settled_left, left.error, right.error))
    lopsided = np.flatnonzero(~differ & (settled_left | settled_right)
                              & ~_confirms(ladder.central, settled))
    if lopsided.size:
        side = Estimate(np.where(settled_left, left.value, right.value)[lopsided],
                        NEAR_SAFETY * np.where(settled_left, left.error, right.error)[lopsided])
        status[lopsided] = verdicts(probe, a[lopsided], side, probe.tolerance(flat[lopsided], side.value))
        value[lopsided], error[lopsided] = side.value, side.error
        # A value a kink could explain is not taken as a bug on this evidence, where the sides
        # are seen to differ: beyond both bounds, or, where the unsettled side's quotients
        # crossed a kink among the steps, its value lies beyond the settled side's bound (then
        # kinks explain the values :func:`within_kink` allows, with that bound). Where the
        # unsettled side is not known well enough to tell, a value it could give is undecided
        # (a second ladder, and the sides taken apart, look further); a value off sides that
        # agree is judged by the settled one.
        tol_a = probe.tolerance(flat, a)
        explained, undecided = kink_evidence(a, left, right, tol_a)
        other_crossed = np.where(settled_left, crossed_right, crossed_left)
        seen_apart = other_crossed & (np.abs(right.value - left.value)
                                      > SIGNIFICANCE * settled.error + tol_a + cornered(ladder))
        explained |= seen_apart & within_kink(a, Estimate(left.value, settled.error),
                                               Estimate(right.value, settled.error), tol_a)
        failed = status[lopsided] == FAIL
        status[lopsided[failed & explained[lopsided]]] = KINK
        status[lopsided[failed & undecided[lopsided] & ~explained[lopsided]]] = INCONCLUSIVE
        own = np.where(settled_left, crossed_left, crossed_right)[lopsided]
        withdrawn = lopsided[(status[lopsided] == FAIL) & own]  # the settled side crossed kinks too
        status[withdrawn] = INCONCLUSIVE
        # The settled side's extrapolation is shifted by (A - B) d where f'' jumps at a distance
        # d within the smallest step on that side, which its quotients do not show: a failure
        # must stand that too (kinks-69119: Huber residuals 5e-4 from their corners).
        cornered_out = _corner_withheld(probe, flat, ladder, lopsided, side, status)
        for k in lopsided.tolist():
            reasons[k] = ((CROWDED if k in withdrawn else CORNER_NEAR if k in cornered_out else NEAR_KINK)
                          if status[k] == INCONCLUSIVE else None)
    which = np.flatnonzero(differ)
    if which.size:
        assert tiny is not None and tiny.right.size == which.size
        judge_sides(probe, flat, ladder.pick(which), tiny, which, status, value, error, reasons)
    return Judged(status, Estimate(value, error), tuple(reasons), noisy)


def _corner_withheld(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, which: np.ndarray, side: Estimate,
                     status: np.ndarray) -> set[int]:
    """Positions ``which`` failed on ``side`` (one side's estimate, or the sides' mean) whose
    failure does not stand against that estimate's bound widened by the ladder's corner reach
    (:func:`.refine.corner_reach`): undecided in ``status``; their positions returned."""
    if ladder.corner_reach is None:
        return set()
    a = probe.a[flat[which]]
    reach = Estimate(side.value, side.error + np.nan_to_num(ladder.corner_reach[which], nan=np.inf))
    out = which[(status[which] == FAIL) & (verdicts(probe, a, reach, probe.tolerance(flat[which], side.value)) != FAIL)]
    status[out] = INCONCLUSIVE
    return set(out.tolist())


def _central_where_sides_agree(ladder: Ladder) -> Estimate:
    """The central estimate, with no bound where the one-sided quotients were not seen to
    agree the way a smooth loss's do (:func:`refine.sides_steady`), and a bound at least as
    wide as the sides' first-order extrapolations lie apart (:mod:`.sides_gap`): the central
    quotients are the sides' mean, and where kinks or corners within the steps part the
    sides' extrapolations, f' may lie at either of them (kinks-71026)."""
    central = ladder.central
    error = central.error
    if ladder.sides_apart_by is not None:
        error = np.maximum(error, ladder.sides_apart_by)
    if ladder.sides_steady is None:
        return Estimate(central.value, error)
    return Estimate(central.value, np.where(ladder.sides_steady, error, np.inf))


def _confirms(central: Estimate, side: Estimate) -> np.ndarray:
    """The central estimate is tighter than ``side`` and agrees with it within their bounds."""
    agree = np.abs(central.value - side.value) <= SIGNIFICANCE * (central.error + side.error)
    return agree & (central.error <= side.error)
