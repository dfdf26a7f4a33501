"""Verdicts from one-sided derivatives: a loss smooth at the point, a corner, or a kink at or
near it.

A ladder (:mod:`.refine`) gives each coordinate a central estimate and its left and right
derivatives extrapolated each on its own. Where the sides agree, the loss is smooth or has a
corner (only f'' jumps) and the central estimate or the sides' mean decides. Where they differ
beyond their bounds and the threshold, a pair at a much smaller step tells a kink at the point
(the jump stays) from one near it (the jump moves, and the clean side's derivative is the
derivative here). A kink verdict needs that evidence: the sides seen to differ, and the
analytic value one a kink between them could give. A value off sides that agree with each
other, or that are not known well enough to tell, is a failure or undecided, never a kink.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from .ladder import Estimate
from .probe import TensorProbe
from .refine import Ladder, Tiny
from .kink_evidence import between, cornered, crossed, kink_evidence, near_a_side, within_kink
from .verdict import (CORNER_NEAR, CROWDED, NEAR_KINK, NOISE, SHARED_POINT, SIGNIFICANCE, UNRESOLVED,
                      UNSETTLED, Judged, verdicts)

LOPSIDED = 0.01  # a side whose bound is 100 times tighter than the other's has settled
NEAR_SAFETY = 4.0  # bounds of a side estimated beside a kink are taken 4 times wider
JUMP_KEPT = 0.05  # at a kink the jump seen at a tiny step stays within 5% of the ladder's
CURVATURE_SLACK = 0.01  # first-order quotients at the tiny step may differ by 1% of the jump
# A kink at the point bounds a correct value by its sides only where no other kink can hide
# within the tiny step: taken as so where that step is within 2**12 spacings of x (2**-40 of
# |x|), about where the code's own rounding of a residual already places a kink.
RESOLVED_SPACINGS = 2.0**12


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
    seen = (crossed_left | crossed_right) & (gap > SIGNIFICANCE * tighter + tol_a + cornered(ladder))
    seen &= within_kink(a, Estimate(left.value, tighter), Estimate(right.value, tighter), tol_a)
    status[unresolved & seen] = KINK
    status[unresolved & ~seen & between(a, left, right, tol_a) & near_a_side(a, left, right, tol_a)] = INCONCLUSIVE
    # The sides' mean stands for f' where only f'' jumps at the point; where either side's
    # quotients crossed kinks among the steps (or the gap between them took both signs),
    # more can lie closer than any step, and a failure judged by that mean is not evidence
    # of a bug.
    crowded = (status == FAIL) & by_corner & (crossed_left | crossed_right | turned)
    status[crowded] = INCONCLUSIVE
    noisy = ladder.noise_share > 0.5
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
        _judge_sides(probe, flat, ladder.pick(which), tiny, which, status, value, error, reasons)
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


def _one_clean_side(
    use_left: np.ndarray, use_right: np.ndarray, left: Estimate, right: Estimate, otherwise: Estimate
) -> Estimate:
    """The one side that qualifies where exactly one does, else ``otherwise``."""
    return Estimate.where(use_left & ~use_right, left,
                          Estimate.where(use_right & ~use_left, right, otherwise))


def _judge_sides(
    probe: TensorProbe, flat: np.ndarray, ladder: Ladder, tiny: Tiny, which: np.ndarray,
    status: np.ndarray, value: np.ndarray, error: np.ndarray, reasons: list[str | None],
) -> None:
    """Coordinates whose one-sided derivatives differ: a kink at the point, or near it."""
    f = flat[which]
    a = probe.a[f]
    left, right = ladder.left, ladder.right
    crossed_left, crossed_right = crossed(ladder)
    jump = right.value - left.value
    kept = np.abs(tiny.gap - jump) <= JUMP_KEPT * np.abs(jump) + 4.0 * tiny.one_sided_noise
    # At the point: the analytic value must lie between the sides (a subgradient). Where
    # several kinks meet at the point (a max tied in many rows at once, upstream gradients of
    # both signs), the usual per-kink convention picks one side per kink, and the sum lies
    # between the sums over any subset of them: from 0 (every kink on its resting side) to
    # left + right (every kink on its moving side), which can be outside the two one-sided
    # derivatives when they share a sign. Those extremes are allowed too; a value further out
    # is undecided where the tiny step keeps the jump (a smooth part beside several kinks
    # moves every such sum), and otherwise judged as below.
    inside = within_kink(a, left, right, probe.tolerance(f, a))
    nearer = np.where(np.abs(a - left.value) <= np.abs(a - right.value), left.value, right.value)
    nearer_error = np.where(np.abs(a - left.value) <= np.abs(a - right.value), left.error, right.error)
    # Near it: at the tiny step the side that crossed the kink has moved towards the other
    # side (by jump * distance / step), the clean side has not, and the clean side's
    # derivative is the derivative at the point. With both clean, the tiny step no longer
    # reaches the kink and its central difference is smooth.
    slack = tiny.one_sided_noise + CURVATURE_SLACK * np.abs(jump)
    clean_right = np.abs(tiny.right - right.value) <= SIGNIFICANCE * (right.error + slack)
    clean_left = np.abs(tiny.left - left.value) <= SIGNIFICANCE * (left.error + slack)
    # Where the jump moved, a value between the sides may still come from kinks crowding the
    # point; beyond them (between 0 and their sum) only where the tiny step's own sides are seen
    # to differ (a corner, where only f'' jumps, shows next to no gap there).
    # A jump within the tiny step itself (its sides apart) is a kink at the point or closer
    # than any step: a value between the tiny step's own sides is one it could give too.
    tol_f = probe.tolerance(f, a)
    tiny_apart = np.abs(tiny.gap) > SIGNIFICANCE * 2.0 * tiny.one_sided_noise + tol_f
    tiny_inside = within_kink(a, Estimate(tiny.left, tiny.one_sided_noise),
                               Estimate(tiny.right, tiny.one_sided_noise), tol_f)
    moved_inside = np.where(tiny_apart, inside | tiny_inside, between(a, left, right, tol_f))
    near = _one_clean_side(clean_left, clean_right, left, right, tiny.central)
    only_left, only_right = clean_left & ~clean_right, clean_right & ~clean_left
    near_crossed = (only_left & crossed_left) | (only_right & crossed_right)
    # The clean side is the derivative here as far as its tiny quotient confirms it: to their
    # difference (and that quotient's rounding), where that is wider than its own bound.
    confirmed = np.where(only_left, np.abs(tiny.left - left.value),
                         np.where(only_right, np.abs(tiny.right - right.value), 0.0)) + np.where(
        only_left | only_right, tiny.one_sided_noise, 0.0)
    # Neither side clean: the tiny step itself still reaches what the ladder's steps crossed.
    # Its central quotient's bound is its rounding alone; a corner within the step moves it
    # by as much as the jump of f'' times the step, which the ladder's reach bounds (at a
    # larger step than the tiny one).
    neither = ~clean_left & ~clean_right
    near = Estimate(near.value, np.maximum(NEAR_SAFETY * near.error, confirmed)
                    + np.where(neither, cornered(ladder), 0.0))
    near_status = verdicts(probe, a, near, probe.tolerance(f, near.value))
    # The tiny step sees every kink within it as one at the point: one more closer than it
    # (residuals 0 and 6e-14 from kinks, a step of 3e-11) sets each side across it, and the
    # sides no longer bound a correct value (``hidden``: see RESOLVED_SPACINGS).
    hidden = (np.zeros(f.size, dtype=bool) if tiny.step is None
              else tiny.step > RESOLVED_SPACINGS * probe.resolution(f))
    for j, k in enumerate(which.tolist()):
        if kept[j]:
            # A value outside the sides is a bug only where the steps crossed no other kink:
            # where they did, more can lie closer than any step, each adding its own jump
            # (of either sign) to the values a correct gradient may take at the point; so too
            # where the tiny step cannot rule out one closer than itself (``hidden``).
            # Nor does a single kink at the point bound it: where several meet there beside a
            # smooth part S (right = S + the moving kinks' slopes on the right, left = S + those
            # on the left), the per-kink convention gives S plus any subset of them, which no
            # pair of one-sided derivatives fixes. Undecided here; the second look off the point
            # (offpoint.py), where the kinks part, fails a wrong gradient.
            crowded = crossed_left[j] | crossed_right[j]
            status[k] = KINK if inside[j] else INCONCLUSIVE
            value[k], error[k] = nearer[j], nearer_error[j]
            reasons[k] = (None if inside[j] else CROWDED if crowded else UNRESOLVED if hidden[j]
                          else SHARED_POINT)
        elif near_status[j] != PASS and moved_inside[j]:
            # The jump moved at the tiny step, yet the value lies between the sides: more
            # kinks meet close to the point (ties in many rows) and no step tells them
            # apart; the value is consistent with a kink, not evidence of a bug.
            status[k] = KINK
            value[k], error[k] = nearer[j], nearer_error[j]
            reasons[k] = None
        elif near_status[j] == FAIL and (near_crossed[j] or (tiny_apart[j] and hidden[j])):
            # The side taken as clean crossed kinks of its own among the ladder's steps (they
            # crowd the point, and the tiny step need not be below the nearest), or the tiny
            # step's own sides differ (a kink within it, and more may hide beside it).
            status[k] = INCONCLUSIVE
            value[k], error[k] = near.value[j], near.error[j]
            reasons[k] = CROWDED if near_crossed[j] else UNRESOLVED
        else:
            status[k] = near_status[j]
            value[k], error[k] = near.value[j], near.error[j]
            reasons[k] = NEAR_KINK if near_status[j] == INCONCLUSIVE else None
