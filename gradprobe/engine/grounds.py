"""A failure stands only on grounds checked on its own coordinate.

Every failure rests on an error model: the central tableau on a loss smooth over the steps
(its quotients approach the derivative as even powers of h), a one-sided estimate on a side
smooth over its steps, a kink's sides on no other kink within reach. Each check here looks at
one of those assumptions with evidence the ladders did not use, and withholds (or re-asks)
only failures whose assumption the evidence contradicts; passes are never touched.

- :func:`off_the_grid`: the ladder's steps halve exactly, so a loss that oscillates with a
  period a power of two times the smallest step (a sine far finer than the steps) gives
  quotients that converge, at the model's rate, to a wrong value (aliasing). One pair at a
  step between two of the ladder's (the smallest over sqrt(2)) must fall where the central
  tableau's estimate predicts it; where it does not, the steps were not in the model's
  range, and the coordinate is undecided (a ladder far further down follows). So must one
  far below the ladder (2**-4.5 of its smallest step): corners at every distance from the
  point can bend the quotients' curve into a turn among the ladder's rows, where they
  settle by chance (kinks-210369).
- :func:`crossed_wider`: a kink confirmed at the point with a value outside its sides is a
  bug only where no other kink is within reach (several kinks at the point leave the values
  a correct gradient may take unbounded by the two sides). The pairs taken at steps wider
  than the ladder's (the first pair, the start's probes) show a side's quotient away from
  the line through the ladder's top two rows: a kink crossed between.
- :func:`crossed_bound`: where a side crossed kinks among the ladder's steps, the loss is
  not smooth there and the central tableau's even powers are not its error model: a failure
  on it must also stand against the distance to the smallest step's quotient plus the last
  change (the tail of a first-order series halving per row, what corners crossed within the
  steps leave).
- :func:`.taylor_range.unscaled_moves`: a ladder whose rows move the loss by amounts that do
  not grow with the step (beyond the rounding) was not in the loss's Taylor range, whatever
  its estimates agree on.
- :func:`drifting_sides`: one-sided estimates on steps growing to the params' scale whose
  quotients move like c/h (a fixed change of the loss at every step: a pole or kink closer
  than the steps, its term dropping out) say nothing of the slope at the point.

(A coordinate that moved the loss only at its rounding level at every step taken is
:mod:`.bounded_moves`'s.)
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

import numpy as np

from ..common.roundoff import is_narrow
from ..common.status import FAIL, PASS
from .ladder import NOISE_UNITS, PREDICTION_SLACK, SAFETY, Estimate, drifting
from .probe import Pairs, TensorProbe
from .refine import RATIO, Ladder, Taken, grown_changes, tiny_pair
from .kinks import judge_ladder, sides_differ
from .lopsided import clean_side_failures, moved_kinks, settled_failures
from .quarter_step import tiny_borne_out
from .row_evidence import central_rows, curvature_seen, first_order_rows, smooth_rows
from .taylor_range import unscaled_moves
from .verdict import BOTH_SIDES_MOVED, CROWDED, SIGNIFICANCE, UNRESOLVED, UNSETTLED, Judged, verdicts

OFF_GRID = 2.0**-0.5  # the check's step: the ladder's smallest over sqrt(2), between two rows
# A second pair far below the ladder: 2**-4.5 of its smallest step (off the grid too), or as
# far below as rounding leaves a quarter of the discrepancy plain, up to 2**-2.5 of it.
DEEP, DEEP_LIMIT = 2.0**-4.5, 2.0**-2.5
WIDER_LIMIT = 2.0**8  # wider pairs considered up to this many times the ladder's top step
WIDER_SLACK = 2.0  # a side's quotient at a wider step may leave the line by twice its slope's reach


def judged_ladder(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, start: np.ndarray | None = None,
                  taken: list[Taken] | None = None, wider: np.ndarray | None = None) -> Judged:
    """The ladder judged, after a pair at a tiny step for the coordinates whose sides differ;
    its failures kept only on grounds checked on the coordinate (below), with the wider
    pairs ``taken`` before a ladder from ``start`` and, per coordinate, whether a ladder at
    wider steps crossed kinks (``wider``, :func:`sides_grown`)."""
    which = sides_differ(probe, flat, ladder)
    tiny = None
    if which.size:
        jump = ladder.right.value[which] - ladder.left.value[which]
        tiny = tiny_pair(probe, flat[which], ladder.smallest[which], jump)
        if start is not None and taken:
            ladder = crossed_wider(probe, flat, start, ladder, taken, which)
    judged = tiny_borne_out(probe, flat, ladder, tiny, which, judge_ladder(probe, flat, ladder, tiny))
    judged = settled_failures(probe, flat, ladder, judged)  # a side settled beside a kink?
    judged = clean_side_failures(probe, flat, ladder, judged)  # the tiny step's smooth loss borne out wider?
    judged = moved_kinks(probe, flat, ladder, judged, tiny)  # a value between sides beside a kink: the clean side's?
    judged = crossed_bound(probe, flat, ladder, judged, wider)
    judged = rows_bear_out(probe, flat, ladder, off_the_grid(probe, flat, ladder, judged))
    return unscaled_moves(probe, flat, ladder, judged)


def rows_bear_out(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """``judged`` with failures undecided where one of the ladder's own central quotients,
    whose rounding is below the discrepancy, lies within that rounding of the analytic value.

    A measured quotient agreeing with backward to its own rounding, while the extrapolated
    estimate says otherwise beyond its bound, shows the tableau's model (errors shrinking
    4-fold per halving) does not hold on the coordinate: a corner of the second derivative at
    the point (a Huber loss's residual exactly at its corner) leaves an error linear in the
    step, which the rows' rounding hides until the smallest steps (kinks-54098)."""
    if is_narrow(probe.compute_dtype) or ladder.pairs is None:
        return judged
    which = np.flatnonzero(judged.status == FAIL)
    if which.size == 0:
        return judged
    q, noise = central_rows(ladder, which)
    a = probe.a[flat[which]]
    gap = np.abs(a - judged.estimate.value[which])
    with np.errstate(invalid="ignore"):
        agrees = ((np.abs(q - a) <= noise) & (noise < gap)).any(axis=0)
    return _undecided(judged, which[agrees])


def _rows(ladder: Ladder, n: int) -> int:
    assert ladder.pairs is not None
    return ladder.pairs.f_plus.size // n


def off_the_grid(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """``judged`` with failures that rest on the central tableau kept only where a pair at a
    step off the ladder's grid, and then one far below it, agree with the tableau's
    prediction (see the module's note); the others undecided (UNSETTLED, not noise-limited, so a retry goes to smaller steps)."""
    if is_narrow(probe.compute_dtype) or ladder.pairs is None:
        return judged
    central = ladder.central
    which = np.flatnonzero((judged.status == FAIL) & np.isfinite(central.error)
                           & (judged.estimate.value == central.value))
    if which.size == 0:
        return judged
    n = flat.size
    rows = _rows(ladder, n)
    last = ladder.pairs.central.reshape(rows, n)[-1, which]
    last_noise = (2 * ladder.pairs.noise / (ladder.pairs.h_plus + ladder.pairs.h_minus)).reshape(rows, n)[-1, which]
    value, error = central.value[which], central.error[which]
    off, _, _ = _off_prediction(probe, flat[which], ladder.smallest[which] * OFF_GRID, value, error, last,
                                last_noise, PREDICTION_SLACK * OFF_GRID**2)
    judged = _undecided(judged, which[off])
    # Below the ladder: the model's error shrinks with the step, so a pair far below its
    # smallest step lies closer to the estimate than the smallest row did (first order, the
    # most a corner at the point leaves); rows that met a turn of the quotients' curve among
    # corners at every distance settle by chance above it (kinks-210369). Where it does not,
    # the bound is widened to cover it (as the tableau widens one a next row contradicts) and
    # the failure stands only against that: the code's own rounding of a moved residual, far
    # above the loss's at such steps, moves the pair too, though never by the bug's size
    # (steep-220075: a pole's 1 - u = 1.3e-7 rounded at 1e-16, the pair 7,000 off a slope of
    # 3.3e9 against a value 50% off).
    which, value, error, last, last_noise = (v[~off] for v in (which, value, error, last, last_noise))
    if which.size == 0:
        return judged
    smallest = ladder.smallest[which]
    gap = np.abs(probe.a[flat[which]] - value)
    with np.errstate(divide="ignore", over="ignore"):
        resolving = 4.0 * NOISE_UNITS * probe.loss_noise(np.full(which.size, probe.f0)) / gap
    step = np.clip(resolving, smallest * DEEP, smallest * DEEP_LIMIT)
    shrink = PREDICTION_SLACK * step / smallest
    deep, q, q_noise = _off_prediction(probe, flat[which], step, value, error, last, last_noise, shrink)
    a, tol = probe.a[flat[which]], probe.tolerance(flat[which], value)
    with np.errstate(invalid="ignore", over="ignore"):
        widened = Estimate(value, SAFETY * np.abs(q - value) + error)
        # Where the pair cannot tell the analytic value apart on its own reading (beyond its
        # rounding and what the model leaves at its step), the rows' plateau is all the
        # failure rests on. Corners closer than the pair shift a plateau by a fixed (A - B) d
        # / 2 that the rows do not show (their f'' jumps cancelling in the first-order term):
        # a failure within what a jump of the curvature the rows see, at the pair's step,
        # could make is not evidence (kinks-480855: Huber corners 3.9e-8 either side, the
        # rows settled 1.1e-9 off the true derivative against a curvature of 0.16, the pair
        # at 8.4e-8 rounding at 1.3e-9).
        blind = ~(np.abs(a - q) > tol + NOISE_UNITS * q_noise + shrink * np.abs(last - value))
        blind &= first_order_rows(ladder, which) & (np.abs(a - value) <= curvature_seen(probe, ladder, which) * step)
    deep &= verdicts(probe, a, widened, tol) != FAIL
    deep |= blind
    return _undecided(judged, which[deep])


def _off_prediction(probe: TensorProbe, flat: np.ndarray, step: np.ndarray, value: np.ndarray, error: np.ndarray,
                    last: np.ndarray, last_noise: np.ndarray, shrink: np.ndarray | float
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per coordinate: whether a pair at ``step`` lies off the central estimate ``value`` +-
    ``error`` by more than ``shrink`` times the ladder's last quotient's distance ``last``
    from it, plus both quotients' rounding; that pair's quotient, and its rounding."""
    p = probe.pairs(flat, step)
    noise = 2 * p.noise / (p.h_plus + p.h_minus)
    with np.errstate(invalid="ignore", over="ignore"):
        predicted = shrink * np.abs(last - value) + error + NOISE_UNITS * (noise + last_noise)
        return ~(np.abs(p.central - value) <= predicted), p.central, noise


def sides_grown(probe: TensorProbe, ladder: Ladder) -> np.ndarray:
    """Per coordinate of the ladder: a side's quotients changed by more than the row before,
    beyond the rounding (:func:`.refine.grown_changes`): kinks crossed among its steps."""
    assert ladder.pairs is not None
    p, n = ladder.pairs, ladder.smallest.size
    rows = _rows(ladder, n)
    right, left = (s.reshape(rows, n) for s in p.sides(probe.f0))
    noise = p.noise.reshape(rows, n)
    return (grown_changes(right, 2 * noise / p.h_plus.reshape(rows, n))
            | grown_changes(left, 2 * noise / p.h_minus.reshape(rows, n)))


def crossed_bound(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged,
                  wider: np.ndarray | None = None) -> Judged:
    """``judged`` with failures that rest on the central tableau withheld where a side crossed
    kinks among the ladder's steps (module's note): where its quotients changed by more than
    the row before, beyond the rounding, kinks were crossed and more can lie closer than any
    step (CROWDED, as for the sides' mean; so too where a ladder at wider steps, ``wider``,
    saw that and this one's sides cross kinks all the same), unless the sides' gap is seen
    to vanish like h above the noise (a steep smooth loss, whose quotients' changes grow at
    steps beyond its bend, not a kink); where they only drift like c/h (which a fixed
    rounding offset does too), the failure must stand beyond SIGNIFICANCE times the
    first-order tail (else UNSETTLED). The estimate itself is left as it was."""
    if ladder.pairs is None or ladder.left_crossed is None or ladder.right_crossed is None:
        return judged
    n = flat.size
    rows = _rows(ladder, n)
    if rows < 2:
        return judged
    central = ladder.central
    if wider is not None:  # kinks crossed wider, and no sign of the smooth model on these rows
        on_central = (judged.status == FAIL) & wider & (judged.estimate.value == central.value)
        if ladder.sides_vanish is not None:
            on_central &= ~ladder.sides_vanish
        blind = np.flatnonzero(on_central)
        judged = _undecided(judged, blind[~smooth_rows(ladder, blind)], CROWDED)
    crossed = ladder.left_crossed | ladder.right_crossed
    which = np.flatnonzero((judged.status == FAIL) & crossed & (judged.estimate.value == central.value))
    if which.size == 0:
        return judged
    q = ladder.pairs.central.reshape(rows, n)[:, which]
    grown = sides_grown(probe, ladder)[which]
    if wider is not None:
        grown |= wider[which]
    if ladder.sides_vanish is not None:  # the sides' gap vanishes like h above the noise:
        grown &= ~ladder.sides_vanish[which]  # positive evidence of no kink at the last rows
    value = central.value[which]
    with np.errstate(invalid="ignore", over="ignore"):
        tail = SAFETY * (np.abs(value - q[-1]) + np.abs(q[-1] - q[-2])) + central.error[which]
        within = ~(np.abs(probe.a[flat[which]] - value) > SIGNIFICANCE * tail)
    judged = _undecided(_undecided(judged, which[within & ~grown]), which[grown], CROWDED)
    return _undecided(judged, which[(judged.status[which] == FAIL) & both_sides_drift(probe, ladder)[which]],
                      BOTH_SIDES_MOVED)


def both_sides_drift(probe: TensorProbe, ladder: Ladder) -> np.ndarray:
    """Per coordinate of the ladder: both sides' quotients drift like c/h
    (:func:`.ladder.drifting`, at any size): the loss sits a fixed amount away from its value
    at the point on either side, whatever the step. A smooth loss's one-sided changes shrink
    with the step on both sides; fixed ones on both are a feature narrower than the smallest
    step at the point (a pole crossed on one side, a spike), and central quotients steady at
    such steps (the two offsets cancelling) are the slope beyond it, not at the point."""
    assert ladder.pairs is not None
    n = ladder.smallest.size
    rows = _rows(ladder, n)
    right, left = (s.reshape(rows, n) for s in ladder.pairs.sides(probe.f0))
    zero = np.zeros_like(right)
    with np.errstate(invalid="ignore", over="ignore"):
        return (np.asarray(drifting(right, zero, RATIO).any(axis=0))
                & np.asarray(drifting(left, zero, RATIO).any(axis=0)))


def _undecided(judged: Judged, k: np.ndarray, reason: str = UNSETTLED) -> Judged:
    """``judged`` with positions ``k`` undecided (UNSETTLED by default; not noise-limited: a
    retry goes to smaller steps)."""
    return judged.undecided(k, (reason,) * k.size, noise_limited=False)


def crossed_wider(probe: TensorProbe, flat: np.ndarray, start: np.ndarray, ladder: Ladder,
                  taken: list[Taken], which: np.ndarray) -> Ladder:
    """The ladder with each side's ``crossed`` flag set, at positions ``which`` (those whose
    sides differ), where a pair ``taken`` at a wider step (up to WIDER_LIMIT times the top)
    shows that side off the line through the ladder's top two rows (module's note)."""
    if (which.size == 0 or not taken or ladder.pairs is None or ladder.left_crossed is None
            or ladder.right_crossed is None):
        return ladder
    n = flat.size
    rows = _rows(ladder, n)
    if rows < 2:
        return ladder
    p = ladder.pairs
    right, left = (s.reshape(rows, n) for s in p.sides(probe.f0))
    hp, hm = p.h_plus.reshape(rows, n), p.h_minus.reshape(rows, n)
    noise = p.noise.reshape(rows, n)
    left_crossed, right_crossed = ladder.left_crossed.copy(), ladder.right_crossed.copy()
    position = {int(f): j for j, f in enumerate(flat[which].tolist())}
    for where, asked, got in taken:
        for i, f in enumerate(where.tolist()):
            j = position.get(int(f))
            if j is None:
                continue
            k = which[j]
            if not (start[k] * (1 + 1e-9) < asked[i] <= WIDER_LIMIT * start[k]):
                continue
            wide = Pairs(*(x[i:i + 1] for x in got.fields()))
            if not min(float(wide.h_plus[0]), float(wide.h_minus[0])) > start[k]:
                continue  # shrunk at a domain edge: not wider than the ladder after all
            w_right, w_left = (float(s[0]) for s in wide.sides(probe.f0))
            for side, wide_q, h, crossed in ((right, w_right, hp, right_crossed), (left, w_left, hm, left_crossed)):
                crossed[k] |= _off_line(side[0, k], side[1, k], h[0, k], h[1, k], wide_q,
                                        float(wide.h_plus[0] if side is right else wide.h_minus[0]),
                                        noise[0, k] + noise[1, k] + float(wide.noise[0]))
    return replace(ladder, left_crossed=left_crossed, right_crossed=right_crossed)


def _off_line(q0: float, q1: float, h0: float, h1: float, wide: float, big: float, noise: float) -> bool:
    """A one-sided quotient ``wide`` at step ``big`` lies off the line through (h0, q0) and
    (h1, q1) by more than WIDER_SLACK times the line's own change out to ``big`` plus the
    quotients' rounding (each quotient's noise is 2 noise / its step)."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        slope = (q0 - q1) / (h0 - h1)
        predicted = q0 + slope * (big - h0)
        room = WIDER_SLACK * abs(slope) * (big - h0) + 2.0 * NOISE_UNITS * 2.0 * noise * (1.0 / h1 + 1.0 / big)
        return bool(abs(wide - predicted) > room)


def drifting_sides(probe: TensorProbe, flat: np.ndarray, before: Judged, apart: Judged, left: Estimate,
                   right: Estimate, left_drift: np.ndarray, right_drift: np.ndarray,
                   judge: Callable[[TensorProbe, np.ndarray, Estimate, Estimate], Judged]) -> Judged:
    """``apart`` (verdicts of the one-sided estimates taken apart) with its failures judged
    again with the sides whose quotients drift like c/h given no bound; a failure that does
    not stand so takes that verdict (undecided where neither side decides alone). Where the
    ladders found kinks crowding the point (``before``'s reason CROWDED), no failure from the
    sides stands: its sides are the same two one-sided derivatives, which kinks crowding
    the point do not let bound the values a correct gradient may take."""
    crowded = np.array([r in (CROWDED, UNRESOLVED) for r in before.reasons], dtype=bool)
    kept = np.flatnonzero((apart.status == FAIL) & crowded)
    apart = apart.merged(kept, before.pick(kept)) if kept.size else apart
    # A pass on such a side is no better founded than a failure (a loss that sits a fixed
    # amount off at every step shows a slope of c/h at the top step, whatever f' is).
    which = np.flatnonzero(((apart.status == FAIL) | (apart.status == PASS)) & (left_drift | right_drift))
    if which.size == 0:
        return apart
    def voided(e: Estimate, d: np.ndarray) -> Estimate:
        return Estimate(e.value[which], np.where(d[which], np.inf, e.error[which]))

    again = judge(probe, flat[which], voided(left, left_drift), voided(right, right_drift))
    gone = np.flatnonzero(again.status != apart.status[which])
    return apart.merged(which[gone], again.pick(gone)) if gone.size else apart
