"""The loss's rounding seen when one coordinate moves, for float32 code judged on its own
arithmetic where the target's one figure leaves the coordinate undecided (16-bit arithmetic,
whose loss is a staircase of its own, is judged as before: :mod:`.along`).

The loss's rounding is measured once per target (:mod:`.noise`) by moving every tensor at
once; one summand that rounds coarsely (exp of a large argument) then sets the figure for every
coordinate. But when one coordinate moves alone, summands that do not depend on it are
computed from the same values each time and round the same way: their rounding cancels in
every difference of the loss along it. What remains is the rounding of what the coordinate
does move, which the loss shows directly along the coordinate.

Measured per coordinate at the points the wide steps use (the point, and the widest step on
either side, :data:`.wide_steps.WIDE_LAST`): JITTER losses each, at moves DELTA apart along the
coordinate, DELTA at least the move that changes the loss by CHANGE_ULPS units of its last
place as the analytic gradient predicts (not the tensor's floor, which may lie far above a
small gradient), so the moves reach past the loss's own rounding.
Fourth differences cancel how the loss changes along the coordinate (the slope, curvature
and third-order term at that scale, whatever the gradient: third differences kept the
last, which moves of a quarter of the widest step along a strongly curved loss put far above
its rounding) and keep how its rounding varies from point to point: independent roundings of
spread s give fourth differences of spread sqrt(70) s; FOURTH_AS_THIRD times the largest of
3 (JITTER - 4) = 9 of them is about seven times s, as the largest of twelve third differences
was (simulated: their distributions agree to 10%, the fourth's a little lower at the low
end, which the factor covers; a step of a staircase shows as two to four times its height).
The rounding of one loss value is taken as that, never below the loss's own last place. A coordinate whose loss took a single
value at some measured point (a staircase coarser than all its moves, or moves the gradient
mispredicts), or left forward's domain, keeps the target's figure: nothing was measured.
Where only a side's row took one value while the point's own row spoke (a loss that
saturates on that side, a sharp softplus), the rows are measured again NEARER_BY times
nearer the point (at most NEARER times), and the figure holds for pairs whose moves stay
within the reach measured (beyond it, the target's figure). At most MEASURED coordinates per
tensor (as many as the ladders re-estimate); the wide steps are judged again with the
measured figure, with windows without extrapolation too (:func:`.wide_steps.plain_windowed`:
rounding, not curvature, limits these quotients); those still undecided by rounding, on the
widest steps within reach averaged over jittered pairs (:mod:`.averaged`), then on one side
(:mod:`.one_side`), then on quotients at many steps fitted as one curve (:mod:`.fitted`);
last, on a side where the loss kept its value at every step taken (:mod:`.flat_side`), with
the rounding the moving side's row shows where nothing else was measured (a level row says
nothing of its own rounding, :func:`_beside_flat`).
"""

from __future__ import annotations

import numpy as np

from .averaged import averaged_estimate, within_reach
from .fitted import fitted_passes
from .flat_side import flat_side_passes
from .one_side import narrow_passes, one_sided_passes
from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_NOISE, WIDE_ROWS
from .wide_step_kinks import KINK_WITHIN, kinks_within_reach
from .probe import Pairs, TensorProbe
from .widened import as_seen
from .refine import Taken
from .verdict import NOISE, SIGNIFICANCE, Judged, judge_plain
from ..common.roundoff import unit_roundoff
from ..common.status import INCONCLUSIVE

UNMODELLED = ("the loss along it does not follow the error model of central differences at the wide "
              "steps that rounding needs")
JITTER = 7  # losses per measured point: four third differences
CHANGE_ULPS = 2.0  # each move changes the loss by at least this many units of its last place
SMALLEST_SHARE = 1.0 / 512.0  # moves are at least this share of the widest step
LARGEST_SHARE = 0.25  # and at most this share (the measured points stay near the steps used)
DISTINCT = 2  # each measured point's losses take this many values at least (a step of a staircase)
MEASURED = 400  # coordinates per tensor measured (the first undecided ones)
NEARER_BY = 8.0  # a side that says nothing is measured again this many times nearer the point
NEARER = 2  # at most this many times (down to 1/64 of the widest step)
REACH_SLACK = 1e-6  # a pair's moves within the measured reach (steps are rounded to the grid)
ORDER = 4  # differences of this order: they cancel the loss's change along the row to its cubic term
FOURTH_AS_THIRD = 0.65  # scaled as third differences of the same roundings spread (see the note)


def own_rounding(probe: TensorProbe, flat: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per coordinate ``flat[i]``: the rounding of one loss value when that coordinate alone
    moves (absolute) and the reach it was measured over (the distance of the farthest
    measured points from the point), NaN where nothing was measured; and on how many sides
    (0, 1 or 2) of the point the loss took its value at the point at every point measured
    (the coordinate moves it there by less than its rounding out to the widest step, or not
    at all). Measured first at the widest
    step; where a side says nothing there but the point does (a loss that saturates on one
    side: a flat row is no measure of its rounding), again NEARER_BY times nearer, at most
    NEARER times. JITTER times 3 calls per coordinate and try. Fourth: where the loss kept
    its value at the point on one side at the widest step while the other side's row spoke
    (:func:`_beside_flat`), that row's rounding, for the flat side's one-sided quotients
    (NaN elsewhere; over the same reach)."""
    n = flat.size
    rounding, reach = np.full(n, np.nan), np.full(n, np.nan)
    todo, w = np.arange(n), _widest(probe, flat)
    level = np.zeros(n, dtype=np.int8)
    beside = np.full(n, np.nan)
    for tries in range(NEARER + 1):
        measured, spoke, extent, one_value, flat_side = _rows_at(probe, flat[todo], w[todo])
        if tries == 0:
            level, beside = one_value, flat_side
            reach = np.where(np.isfinite(beside), extent, reach)
        done = np.isfinite(measured)
        rounding[todo[done]], reach[todo[done]] = measured[done], extent[done]
        todo = todo[~done & spoke]
        if todo.size == 0 or tries == NEARER:
            break
        w[todo] /= NEARER_BY
    return rounding, reach, level, np.where(np.isfinite(rounding), np.nan, beside)


def _rows_at(probe: TensorProbe, flat: np.ndarray, widest: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The rounding measured from rows of JITTER losses at the point and at ``widest`` on
    either side (NaN where a row says nothing), whether the point's own row spoke, the
    distance of the farthest measured points, on how many sides every loss measured
    (the point's row's half and the side's row) was f0, and the rounding beside a flat
    side (:func:`_beside_flat`)."""
    n = flat.size
    x = probe.x[flat]
    eps = float(np.finfo(probe.compute_dtype).eps)
    slope = np.maximum(np.abs(probe.a[flat]), 1e-300)  # the change the analytic gradient predicts
    delta = np.clip(CHANGE_ULPS * eps * abs(probe.f0) / slope, SMALLEST_SHARE * widest, LARGEST_SHARE * widest)
    offsets = np.arange(JITTER) - (JITTER - 1) / 2.0
    points, seen = [], []
    with np.errstate(over="ignore", invalid="ignore"):
        for centre in (0.0, 1.0, -1.0):
            for k in offsets:
                moved = (x.astype(np.float64) + centre * widest + k * delta).astype(x.dtype)
                points.append(moved)
                seen.append(as_seen(moved, probe.compute_dtype))
    values = probe.evaluator.single_moves(probe.tensor, flat, tuple(points))  # (n, 3 * JITTER)
    where = np.stack(seen, axis=1)
    rounding, spoke = np.full(n, np.nan), np.zeros(n, dtype=bool)
    for i in range(n):
        rows, at = values[i].reshape(3, JITTER), where[i].reshape(3, JITTER)
        rounding[i] = _measured(rows, at, eps)
        spoke[i] = np.isfinite(_measured(rows[:1], at[:1], eps))
    same = values == probe.f0  # (n, 3 * JITTER): rows at the point, at +widest, at -widest
    half = JITTER // 2
    right = same[:, half:JITTER].all(axis=1) & same[:, JITTER:2 * JITTER].all(axis=1)
    left = same[:, :half + 1].all(axis=1) & same[:, 2 * JITTER:].all(axis=1)
    beside = np.full(n, np.nan)
    for j in np.flatnonzero(right ^ left).tolist():
        beside[j] = _beside_flat(values[j].reshape(3, JITTER), where[j].reshape(3, JITTER), 2 if right[j] else 1, eps)
    return rounding, spoke, widest + offsets[-1] * delta, right.astype(np.int8) + left.astype(np.int8), beside


def _beside_flat(rows: np.ndarray, where: np.ndarray, other: int, eps: float) -> float:
    """One coordinate's rounding where the loss kept its value at the point on one side (the
    point's row's half and the side's row all f0), from row ``other`` (the far row on the
    side that moves; NaN where it says nothing), never below the last place of any loss
    measured. The flat side shows no rounding of its own (its losses are one value); what
    could hide a slope there is the rounding of the same sum once the coordinate's share of
    it changes, which the moving side's row shows at the same distance from the point, not
    the rounding of the whole target's moves. The point's own row straddles the flat
    stretch's end (often a kink) and is left out."""
    figure = _measured(rows[other:other + 1], where[other:other + 1], eps)
    if not np.isfinite(figure):
        return np.nan
    return max(figure, eps * float(np.max(np.abs(rows))))


def _widest(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    """The widest step the wide estimate may use at each coordinate (as wide_estimate)."""
    h0 = probe.prior_steps(flat)
    limit = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    steps = h0[None, :] * 2.0 ** ks[:, None]
    fits = np.where(steps <= limit[None, :], steps, 0.0).max(axis=0)
    return np.where(fits > 0, fits, h0 * 2.0**WIDE_FIRST)


def _measured(values: np.ndarray, where: np.ndarray, eps: float) -> float:
    """One coordinate's rounding from its rows of losses (a row per measured point) at the
    positions the forward saw; NaN where a row says nothing."""
    if not (np.all(np.isfinite(values)) and np.all(np.isfinite(where))):
        return np.nan
    worst = 0.0
    for f, p in zip(values, where):
        if np.unique(f).size < DISTINCT or np.any(np.diff(p) <= 0):
            return np.nan  # a staircase coarser than the moves, or a move the type swallowed
        # The moves really made are not evenly spaced (x + k delta rounds to the type's grid):
        # the values are taken at evenly spaced points, the row's own slope across the gap.
        even = np.linspace(p[0], p[-1], p.size)
        g = f - (f[-1] - f[0]) / (p[-1] - p[0]) * (p - even)
        fourth = FOURTH_AS_THIRD * np.abs(np.diff(g, n=ORDER))
        worst = max(worst, float(fourth.max()), eps * float(np.max(np.abs(f))))
    return worst


def _renoised(p: Pairs, flat: np.ndarray, rounding: dict[int, tuple[float, float]], eps: float) -> Pairs:
    """``p`` (pairs at coordinates ``flat``) with the measured rounding in place of the
    target's figure where one was measured and the pair's moves stay within the reach it was
    measured over (never below the values' own last place)."""
    own = np.array([rounding.get(int(k), (np.nan, np.nan)) for k in flat], dtype=np.float64).reshape(-1, 2)
    figure, reach = own[:, 0], own[:, 1]
    with np.errstate(invalid="ignore"):
        mine = np.isfinite(figure) & (np.maximum(p.h_plus, p.h_minus) <= reach * (1.0 + REACH_SLACK))
    floor = eps * np.maximum(np.abs(p.f_plus), np.abs(p.f_minus))
    noise = np.where(mine, np.maximum(np.nan_to_num(figure), floor), p.noise)
    return Pairs(p.f_plus, p.f_minus, p.h_plus, p.h_minus, noise)


class _OwnRounding(TensorProbe):
    """A probe whose pairs carry each coordinate's own measured rounding."""

    rounding: dict[int, tuple[float, float]]

    def pairs(self, flat: np.ndarray, h: np.ndarray) -> Pairs:
        return _renoised(super().pairs(flat, h), flat, self.rounding, self.eps)


def _with_own(probe: TensorProbe, rounding: dict[int, tuple[float, float]]) -> _OwnRounding:
    view = _OwnRounding.__new__(_OwnRounding)
    view.__dict__.update(probe.__dict__)
    view.rounding = rounding
    return view


def judged_on_own_rounding(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """Coordinates ``flat`` that rounding left undecided in ``judged`` (the wide steps' verdicts
    included) judged again on the wide steps with each one's own measured rounding (pairs
    ``taken`` before are reused); where still undecided, the reason names the smallest
    relative error its rounding would let show."""
    if unit_roundoff(probe.compute_dtype) >= unit_roundoff(np.float16):
        return judged  # 16-bit arithmetic: a staircase of its own (see .along)
    noisy = np.flatnonzero((judged.status == INCONCLUSIVE) & np.array([r == NOISE for r in judged.reasons], dtype=bool))
    if noisy.size == 0:
        return judged
    noisy = noisy[:MEASURED]
    where = flat[noisy]
    measured, reach, level, beside = own_rounding(probe, where)
    rounding = {int(k): (float(v), float(r)) for k, v, r in zip(where, measured, reach) if np.isfinite(v)}
    flat_sides = {int(k): (float(v), float(r)) for k, v, r in zip(where, beside, reach) if np.isfinite(v)}
    if rounding:
        view = _with_own(probe, rounding)
        again = [(f, s, _renoised(p, f, rounding, probe.eps)) for f, s, p in taken]
        mine = np.flatnonzero(np.isfinite(measured))
        est = within_reach(view, where[mine], reach[mine], again)
        redo = kinks_within_reach(view, where[mine], judge_plain(view, where[mine], est), again)
        decided = np.flatnonzero((redo.status != INCONCLUSIVE) | np.array([r == KINK_WITHIN for r in redo.reasons], dtype=bool))
        judged = judged.merged(noisy[mine[decided]], redo.pick(decided))
        judged = _averaged(view, flat, judged, noisy[mine], reach[mine], again)
        judged = _one_side(view, flat, judged, noisy, again)
        judged = fitted_passes(view, flat, judged, noisy, measured, reach, _widest(probe, where))
    else:
        judged = _one_side(probe, flat, judged, noisy, taken)
    # A side where the loss kept its value, on its own quotients (passes only), with the
    # rounding the moving side shows where nothing else was measured (see _beside_flat).
    judged = flat_side_passes(_with_own(probe, {**rounding, **flat_sides}), flat, judged, noisy, taken,
                              (NOISE, KINK_WITHIN))
    still = np.flatnonzero((judged.status[noisy] == INCONCLUSIVE))
    if still.size == 0:
        return judged
    return _explained(probe, flat, judged, noisy[still], measured[still], reach[still], level[still])


def _one_side(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, taken: list[Taken]) -> Judged:
    """Coordinates ``which`` still undecided for rounding, or for a kink within the wide steps,
    passed on one side's quotients or on rows below the wide steps (:mod:`.one_side`)."""
    why = (NOISE, KINK_WITHIN)
    return narrow_passes(probe, flat, one_sided_passes(probe, flat, judged, which, taken, why), which, taken, why)


def _averaged(view: _OwnRounding, flat: np.ndarray, judged: Judged, which: np.ndarray, reach: np.ndarray,
              taken: list[Taken]) -> Judged:
    """``judged`` with coordinates ``which`` (their own rounding measured over ``reach``) that
    rounding still leaves undecided judged on wide steps averaged over jittered pairs
    (:mod:`.averaged`: one more batch of evaluations before giving up)."""
    left = np.flatnonzero((judged.status[which] == INCONCLUSIVE)
                          & np.array([judged.reasons[k] == NOISE for k in which], dtype=bool))
    if left.size == 0:
        return judged
    where = flat[which[left]]
    est = averaged_estimate(view, where, reach[left], taken)
    more = kinks_within_reach(view, where, judge_plain(view, where, est), taken)
    decided = np.flatnonzero((more.status != INCONCLUSIVE) | np.array([r == KINK_WITHIN for r in more.reasons], dtype=bool))
    # Still undecided by rounding: the tighter bound is kept, the verdict and reason as they
    # were (16-bit code on its float32 run is judged on it at its own threshold, promote.py).
    tighter = np.flatnonzero((more.status == INCONCLUSIVE) & np.array([r == NOISE for r in more.reasons], dtype=bool)
                             & (more.estimate.error < judged.estimate.error[which[left]]))
    kept = judged.pick(which[left[tighter]])
    judged = judged.merged(which[left[tighter]], Judged(kept.status, more.estimate.pick(tighter), kept.reasons,
                                                        kept.noise_limited))
    return judged.merged(which[left[decided]], more.pick(decided))


def _explained(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, measured: np.ndarray,
               reach: np.ndarray, level: np.ndarray) -> Judged:
    """The NOISE reason of coordinates ``which`` with the smallest relative error that
    rounding alone lets show on each: SIGNIFICANCE times the least bound a wide-step window
    can have, WIDE_NOISE times the rounding of the central quotient at half the widest step
    on the coordinate's smooth range (the estimate of the widest window without
    extrapolation), over its scale. The rounding is the one measured when the coordinate
    moves, at steps within the reach it was measured over, or the target's figure at the
    widest step its scale allows, whichever lets the smaller error show. Where the loss kept
    its value at the point at every point measured on one side or both (``level``: 1 or 2),
    the reason says so: what the coordinate moves there stays below the loss's rounding,
    which only the target's figure bounds."""
    where = flat[which]
    widest = _widest(probe, where)
    target = WIDE_NOISE * 2.0 * probe.loss_noise(np.full(where.size, probe.f0)) / widest
    with np.errstate(invalid="ignore", divide="ignore"):
        own = np.where(np.isfinite(measured), WIDE_NOISE * 2.0 * measured / np.minimum(reach, widest), np.inf)
    quotient = np.minimum(own, target)
    scale = probe.denominators(where, judged.estimate.value[which])
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):  # a scale of the floor's tiny value
        smallest = np.maximum(SIGNIFICANCE * quotient, probe.threshold * scale) / scale
    reasons = list(judged.reasons)
    for k, i in enumerate(which):
        if reasons[i] != NOISE:
            continue
        if own[k] > target[k]:
            how, steps = "measured for the whole target", "the widest step its scale allows"
        elif reach[k] < widest[k]:
            how, steps = "measured when it moves", f"the widest step its rounding was measured over ({reach[k]:.2g})"
        else:
            how, steps = "measured when it moves", "the widest step its scale allows"
        if level[k] and SIGNIFICANCE * quotient[k] > probe.threshold * scale[k]:
            where_level = "on either side" if level[k] == 2 else "on one side"
            reasons[i] = (f"{NOISE}: the loss kept its value at the point at every point measured {where_level} "
                          f"of it (out to {widest[k]:.2g}), so what the coordinate changes there stays below the "
                          f"loss's rounding, and that rounding (measured for the whole target) hides any relative "
                          f"error below {smallest[k]:.2g} on it")
        elif SIGNIFICANCE * quotient[k] <= probe.threshold * scale[k]:
            reasons[i] = (f"{UNMODELLED} (its rounding, {how}, would let an error of the "
                          f"threshold show at {steps.replace('the widest step', 'the widest steps')})"
                          f"{_narrower(probe, judged.estimate.error[i], scale[k])}")
        else:
            reasons[i] = (f"{NOISE}: its rounding ({how}) hides any relative error below "
                          f"{smallest[k]:.2g} on it, even at {steps}")
    return Judged(judged.status, judged.estimate, tuple(reasons), judged.noise_limited)


def _narrower(probe: TensorProbe, bound: float, scale: float) -> str:
    """The smallest relative error the narrower steps (the ladders' bound, checked there) let
    show, SIGNIFICANCE bounds over the scale; empty where they bound nothing finer."""
    if not (np.isfinite(bound) and scale > 0 and SIGNIFICANCE * bound > probe.threshold * scale):
        return ""
    return f"; at the narrower steps where it does, rounding hides any relative error below {SIGNIFICANCE * bound / scale:.2g}"


__all__ = ["judged_on_own_rounding", "own_rounding"]
