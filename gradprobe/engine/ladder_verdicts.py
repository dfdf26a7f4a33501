"""Verdicts on ladders for coordinates the first pair of calls did not settle.

A ladder from the step the first pair chose (:mod:`.steps`); where that leaves a coordinate
undecided, a second ladder 2**RETRY_SHIFT steps higher (rounding noise, as far as the slope
stays smooth) or lower (curvature), then the descents below it and between the 16-fold
levels (:mod:`.descent`), a closer look where the steps kept crossing kinks
(:mod:`.close_kinks`), and last each side of the point on its own (:mod:`.sides_apart`).
:mod:`.coordinates` calls it for the coordinates within its budget.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..common.status import INCONCLUSIVE
from .close_kinks import looked_closer
from .descent import between_levels, descend, runaway_passes
from .grounds import drifting_sides, judged_ladder, sides_grown
from .ladder import Estimate
from .lopsided import alone_failures, kink_beside
from .probe import TensorProbe
from .refine import RATIO, ROWS, Taken, climb, ladder_taken
from .side_failures import failures_on_own_rounding
from .sides_apart import judge_sides_apart, one_sided_rows, outside_sides, side_estimate
from .steps import largest_smooth_step
from .kink_evidence import crossed as kinks_crossed
from .verdict import NOISE, OUTSIDE_SIDES, Judged

RETRY_SHIFT = 6  # a second ladder starts 2**6 steps higher (noise) or lower (curvature)


def ladder_verdicts(
    probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int = ROWS,
    taken: list[Taken] | None = None,
) -> Judged:
    """:func:`_ladder_verdicts`, saying which coordinates' ladders crossed kinks among their
    steps (``Judged.crossed``: a failure there is looked at just beside the point, sliver.py)."""
    crossed = np.zeros(flat.size, dtype=bool)
    judged = _ladder_verdicts(probe, flat, start, rows, taken, crossed)
    return replace(judged, crossed=crossed)


def _ladder_verdicts(
    probe: TensorProbe, flat: np.ndarray, start: np.ndarray, rows: int,
    taken: list[Taken] | None, crossed: np.ndarray,
) -> Judged:
    """Judge ``flat`` on a ladder from ``start``; undecided ones get a second ladder. Pairs
    ``taken`` before (the first pairs) are not evaluated again where a ladder meets them; the
    ladders' own pairs are added to ``taken``."""
    before = [] if taken is None else taken
    ladder = climb(probe, flat, start, rows, taken=before)
    crossed |= np.logical_or(*kinks_crossed(ladder))
    start = start if ladder.start is None else ladder.start  # restarted below a domain edge
    first = kink_beside(probe, flat, ladder, judged_ladder(probe, flat, ladder, start, before))
    before.append(ladder_taken(flat, start, ladder))
    first = runaway_passes(first, ladder)  # no pass on quotients running off across a pole
    again = np.flatnonzero(first.status == INCONCLUSIVE)
    if again.size == 0:
        return first
    noisy = first.noise_limited[again]
    shifted = start[again] * RATIO**-RETRY_SHIFT
    if noisy.any():  # larger steps, as far as the slope is seen to stay smooth
        which = np.flatnonzero(noisy)
        shifted[which] = largest_smooth_step(probe, flat[again][which], start[again][which],
                                              np.full(which.size, float(RETRY_SHIFT)), before)
    second_ladder = climb(probe, flat[again], shifted, ROWS + 2, taken=before)
    crossed[again] |= np.logical_or(*kinks_crossed(second_ladder))
    shifted = shifted if second_ladder.start is None else second_ladder.start
    grown = sides_grown(probe, ladder)[again]
    judged = first.merged(again, runaway_passes(kink_beside(
        probe, flat[again], second_ladder, judged_ladder(probe, flat[again], second_ladder, shifted, before, grown)),
        second_ladder))
    before.append(ladder_taken(flat[again], shifted, second_ladder))
    judged = judged.merged(again, descend(probe, flat[again], judged.pick(again), second_ladder, before))
    judged = judged.merged(again, between_levels(probe, flat[again], judged.pick(again), start[again], before))
    # Steps that kept crossing kinks: one-sided slopes down to rounding's floor, where the
    # nearest kink on a side may lie beyond the steps (close_kinks.py).
    judged, unresolved = looked_closer(probe, flat, judged, before)
    still = np.flatnonzero(judged.status == INCONCLUSIVE)
    if still.size == 0:
        return judged
    # Last: each side on its own, on steps growing away from the point (beside a kink the
    # clean side reaches steps that beat the noise).
    smallest = np.minimum(start[still], probe.prior_steps(flat[still]))
    left_rows, right_rows = (one_sided_rows(probe, flat[still], smallest, s) for s in (-1.0, 1.0))
    (left, left_drift), (right, right_drift) = side_estimate(probe, left_rows), side_estimate(probe, right_rows)
    apart = judge_sides_apart(probe, flat[still], left, right)
    apart = drifting_sides(probe, flat[still], judged.pick(still), apart, left, right, left_drift, right_drift,
                           judge_sides_apart)
    # A failure stands only where the rows still fail on the coordinate's own rounding.
    left_side, right_side = (Estimate(e.value, np.where(d, np.inf, e.error))
                             for e, d in ((left, left_drift), (right, right_drift)))
    apart, unsettled = failures_on_own_rounding(probe, flat[still], apart, left_side, right_side,
                                                (left_rows, right_rows), before)
    # A side that decided alone is the slope beside a kink, unless a tiny step shows it is the
    # derivative here (no kink at the point).
    rows_smallest = np.minimum(left_rows.moved[-1], right_rows.moved[-1])
    undecided_before = apart.status == INCONCLUSIVE
    apart = alone_failures(probe, flat[still], apart, left_side, right_side, rows_smallest)
    unsettled |= (apart.status == INCONCLUSIVE) & ~undecided_before
    keep = apart.status != INCONCLUSIVE
    # Undecided where the ladders saw only rounding noise, yet the sides show a kink and the
    # value lies outside it: said so, and the second look (offpoint.py) checks it off the point.
    outside = ~keep & ~unsettled & outside_sides(probe, flat[still], left, right) & (np.array(judged.pick(still).reasons) == NOISE)
    if outside.any():
        k = np.flatnonzero(outside)
        apart = apart.merged(k, Judged(apart.status[k], apart.estimate.pick(k), (OUTSIDE_SIDES,) * k.size,
                                       apart.noise_limited[k]))
        keep |= outside
    return unresolved(judged.merged(still[keep], apart.pick(np.flatnonzero(keep))))


__all__ = ["ladder_verdicts"]
