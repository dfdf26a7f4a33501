"""float64 coordinates the ladders left undecided for rounding, judged again on the loss's
rounding measured along the coordinate.

The ladders take one loss value's rounding as FLOAT64_ROUNDING_UNITS (8) units of eps |f|, an
assumption that holds for long chains of operations. Beside a steep piece (a log near its 0, a
high power) the smooth range along a coordinate can be 1e-9 of its value, the steps stay
below it, and that assumed rounding then hides an error of 1e-3 that the loss resolves: its
real rounding, when that coordinate alone moves, is often a unit or two (what does not depend
on the coordinate is computed from the same values every time and rounds the same way).

So, for at most MEASURED coordinates per tensor whose ladders ended undecided for rounding:

- the rounding is measured along the coordinate, at the point and at the widest step on
  either side (the chain below): POINTS losses each, at moves DELTA apart (each changing the
  loss by about CHANGE_ULPS units of its last place as the analytic slope predicts, between
  1/512 and 1/64 of the widest step). Fourth differences cancel the loss's change along the
  row to its cubic term and keep how its rounding varies: independent roundings of spread s
  give fourth differences of spread sqrt(70) s. One loss value's rounding is taken as
  SPREADS times the largest spread seen (the rms of a row's fourth differences over
  sqrt(70)), never below eps times the largest loss seen; nothing is measured where a row is
  not finite or takes a single value;
- pairs at a chain of CHAIN steps, each half the last, from the widest step at which the
  ladders' pairs were finite on both sides and bent by at most CHAIN_BEND (their one-sided
  slopes that close, as at every step taken below it; reused where taken), cut above the
  first of its own rows that bends more, are judged on windows whose error model is checked
  on the quotients themselves (:func:`.wide_steps.windowed`, :func:`.wide_steps.plain_windowed`)
  with that rounding, their changes shrinking to FIRST_ORDER_LIMIT of the next (a corner at the
  point leaves a first-order error whose changes halve: kinks-120676), unless the one-sided gap stops halving with the step somewhere along
  the chain (a kink within it), its moves lie beyond two roundings yet do not grow with the
  step (:func:`.taylor_range.moves_unscaled`: steps beyond the loss's smooth scale), or they
  stay within two roundings at every step while backward's slope predicts far more
  (:func:`_rounding_alone`). A verdict reached there (pass or fail) is taken; elsewhere the
  ladders' verdict and reason stand.

A zero gradient whose loss shows a slope the assumed rounding leaves unresolved
(:mod:`.unmoved`) gets the same chain from the params' own scale.
"""

from __future__ import annotations

import numpy as np

from ..common.status import INCONCLUSIVE
from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .refine import Taken, pairs_reusing
from .sides_gap import does_not_halve, extrapolations_stay_apart, takes_both_signs
from .steps import slope_change
from .taylor_range import moves_unscaled
from .verdict import NOISE, SIGNIFICANCE, Judged, judge_plain
from .wide_steps import FIRST_ORDER_LIMIT, WIDE_NOISE, plain_windowed, wide_table, windowed

MEASURED = 32  # coordinates per tensor measured (the first undecided ones)
CHAIN = 8  # steps of the chain, each half the last
POINTS = 11  # losses per measured row: seven fourth differences
CHANGE_ULPS = 2.0  # each move changes the loss by about this many units of its last place
SMALLEST_SHARE, LARGEST_SHARE = 1.0 / 512.0, 1.0 / 64.0  # moves as shares of the widest step
FOURTH_VARIANCE = 70.0  # a fourth difference of independent roundings of spread s spreads by sqrt(70) s
SPREADS = 4.0  # one loss value's rounding: this many times its spread
CHAIN_BEND = 0.5  # rows whose one-sided slopes differ by at most half the slope (as steps.slope_change)


def on_measured_rounding(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with float64 coordinates undecided for rounding judged again as the module
    says (pairs ``taken`` before are reused)."""
    if probe.compute_dtype != np.dtype(np.float64) or probe.narrow is not None or probe.own_code is not None:
        return judged
    noisy = np.flatnonzero((judged.status == INCONCLUSIVE) & np.array([r == NOISE for r in judged.reasons], dtype=bool))
    if noisy.size == 0:
        return judged
    noisy = noisy[:MEASURED]
    where = flat[noisy]
    top = _widest_smooth(probe, where, taken)
    keep = np.isfinite(top) & (top > 0)
    if not keep.any():
        return judged
    noisy, where, top = noisy[keep], where[keep], top[keep]
    est = chain_estimate(probe, where, top, taken)
    again = judge_plain(probe, where, est)
    decided = np.flatnonzero((again.status != INCONCLUSIVE) & np.isfinite(est.error))
    return judged.merged(noisy[decided], again.pick(decided))


def chain_estimate(probe: TensorProbe, flat: np.ndarray, top: np.ndarray, taken: list[Taken] | None = None) -> Estimate:
    """Per coordinate, the windows' estimate on the chain of CHAIN steps halving from ``top``
    with the rounding measured along it (module's note); an infinite bound where nothing was
    measured. Pairs ``taken`` before are reused and the chain's added."""
    est = Estimate(np.full(flat.size, np.nan), np.full(flat.size, np.inf))
    ks = np.arange(CHAIN - 1, -1, -1.0)
    asked = (top[None, :] * 2.0 ** -ks[:, None]).reshape(-1)  # ascending, a row per step
    p = pairs_reusing(probe, np.tile(flat, CHAIN), asked, taken or [])
    if taken is not None:
        taken.append((np.tile(flat, CHAIN), asked, p))
    # Rows from the smallest step up to the first that bends by more than CHAIN_BEND (or is
    # not finite, or did not move as asked): the loss beyond is no longer the one at the point.
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        calm = (slope_change(probe, p) <= CHAIN_BEND) & np.isfinite(p.f_plus) & np.isfinite(p.f_minus) \
            & (np.abs(p.h_plus - asked) <= 1e-6 * asked) & (np.abs(p.h_minus - asked) <= 1e-6 * asked)
    kept = np.cumprod(calm.reshape(CHAIN, flat.size), axis=0).astype(bool)
    rows = kept.sum(axis=0)
    mine = np.flatnonzero(rows >= 3)  # a window of three steps at least
    if mine.size == 0:
        return est
    widest = np.array([asked.reshape(CHAIN, flat.size)[rows[i] - 1, i] for i in mine])
    rounding = measured_rounding(probe, flat[mine], widest)
    keep = np.isfinite(rounding)
    mine, rounding = mine[keep], rounding[keep]
    if mine.size == 0:
        return est
    fields = [np.asarray(f).reshape(CHAIN, flat.size)[:, mine] for f in p.fields()]
    usable = kept[:, mine]
    f_plus, f_minus = (np.where(usable, f, np.nan) for f in fields[:2])
    floor = probe.eps * np.maximum(np.abs(f_plus), np.abs(f_minus))
    noise = np.maximum(np.broadcast_to(rounding, f_plus.shape), np.nan_to_num(floor))
    chain = Pairs(f_plus.reshape(-1), f_minus.reshape(-1), fields[2].reshape(-1), fields[3].reshape(-1),
                  noise.reshape(-1))
    limit = np.maximum(np.abs(probe.x[flat[mine]].astype(np.float64)), probe.x_scale)
    table = wide_table(probe, chain, CHAIN, limit)
    # float64's small rounding tells a first-order error (a corner at the point) plainly
    seen = Estimate.better(windowed(*table, shrink=FIRST_ORDER_LIMIT), plain_windowed(*table, shrink=FIRST_ORDER_LIMIT))
    kinked = does_not_halve(np.abs(table[3]), 2.0 * WIDE_NOISE * table[4]) | takes_both_signs(table[3], table[4])
    kinked |= extrapolations_stay_apart(table[3], table[4])  # a kink closer than every step
    with np.errstate(invalid="ignore"):
        moved = np.maximum(np.abs(f_plus - probe.f0), np.abs(probe.f0 - f_minus))
    steps = np.maximum(fields[2], fields[3])
    kinked |= _rounding_alone(probe, flat[mine], moved, rounding, np.where(usable, steps, 0.0))
    # The chain's rows beyond the loss's Taylor range: moves beyond two roundings that do not
    # grow with the step (steep-87144: steps of 0.06 to 8 beneath sines of radius 1e-2).
    kinked |= moves_unscaled(moved, np.broadcast_to(rounding, moved.shape), np.where(usable, steps, np.nan))
    seen = Estimate(seen.value, np.where(kinked, np.inf, seen.error))
    value, error = est.value.copy(), est.error.copy()
    value[mine], error[mine] = seen.value, seen.error
    return Estimate(value, np.where(np.isfinite(error), error, np.inf))


def _rounding_alone(probe: TensorProbe, flat: np.ndarray, moved: np.ndarray, rounding: np.ndarray,
                    steps: np.ndarray) -> np.ndarray:
    """Per column of the chain: the loss moved by no more than two values' ``rounding`` (the
    one measured) at every row, while backward's slope predicts SIGNIFICANCE times that at
    the widest: as :func:`.grounds.rounding_only` on the target's figure, the coordinate
    reaches the loss only at its rounding level here, and a flat reading says nothing of the
    slope at the point (steep-73224: sines of amplitude 0.03 and period 1e-4 beside a loss of
    4.4e12, their moves within the 0.07 measured along the coordinate at every step from
    2.4e-4 to 3.1e-2, read as 0.3 +- 15 against a true -924)."""
    with np.errstate(invalid="ignore", over="ignore"):
        within = np.all(~(moved > 2.0 * rounding), axis=0)
        predicted = np.abs(probe.a[flat]) * steps.max(axis=0) > SIGNIFICANCE * 2.0 * rounding
    return within & predicted


def _widest_smooth(probe: TensorProbe, where: np.ndarray, taken: list[Taken]) -> np.ndarray:
    """Per coordinate, the widest step asked at which the pairs taken were finite on both
    sides, moved as asked, and bent by at most CHAIN_BEND, as were all those taken at smaller
    steps (NaN where none)."""
    position = {int(k): i for i, k in enumerate(where.tolist())}
    seen: list[list[tuple[float, bool]]] = [[] for _ in range(where.size)]
    for coords, asked, pairs in taken:
        finite = np.isfinite(pairs.f_plus) & np.isfinite(pairs.f_minus)
        exact = (np.abs(pairs.h_plus - asked) <= 1e-6 * asked) & (np.abs(pairs.h_minus - asked) <= 1e-6 * asked)
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            calm = slope_change(probe, pairs) <= CHAIN_BEND
        for k, h, ok in zip(coords[finite & exact].tolist(), asked[finite & exact].tolist(),
                            calm[finite & exact].tolist()):
            i = position.get(int(k))
            if i is not None:
                seen[i].append((h, ok))
    top = np.full(where.size, np.nan)
    for i, steps in enumerate(seen):
        for h, ok in sorted(steps):
            if not ok:
                break
            top[i] = h
    return top


def measured_rounding(probe: TensorProbe, flat: np.ndarray, widest: np.ndarray) -> np.ndarray:
    """Per coordinate, one loss value's rounding measured along it (module's note), NaN where
    a row said nothing. 3 * POINTS calls per coordinate."""
    n = flat.size
    x = probe.x[flat].astype(np.float64)
    slope = np.maximum(np.abs(probe.a[flat]), 1e-300)
    with np.errstate(over="ignore"):  # a huge loss over a slope near 0: the largest share
        delta = np.clip(CHANGE_ULPS * probe.eps * max(abs(probe.f0), 1e-300) / slope,
                        SMALLEST_SHARE * widest, LARGEST_SHARE * widest)
    offsets = np.arange(POINTS) - (POINTS - 1) / 2.0
    points = []
    with np.errstate(over="ignore", invalid="ignore"):
        for centre in (0.0, 1.0, -1.0):
            for k in offsets:
                points.append((x + centre * widest + k * delta).astype(probe.x.dtype))
    values = probe.evaluator.single_moves(probe.tensor, flat, tuple(points))  # (n, 3 * POINTS)
    at = np.stack([q.astype(np.float64) for q in points], axis=1)
    out = np.full(n, np.nan)
    for i in range(n):
        out[i] = _spread_of_rows(values[i].reshape(3, POINTS), at[i].reshape(3, POINTS), probe.eps)
    return out


def _spread_of_rows(values: np.ndarray, where: np.ndarray, eps: float) -> float:
    """SPREADS times the largest spread of the rows' roundings, at least eps times the largest
    loss; NaN where a row is not finite, takes one value, or its moves did not ascend."""
    if not (np.all(np.isfinite(values)) and np.all(np.isfinite(where))):
        return np.nan
    worst = 0.0
    for f, p in zip(values, where):
        if np.unique(f).size < 2 or np.any(np.diff(p) <= 0):
            return np.nan
        # The moves really made are not evenly spaced (x + k delta rounds to the grid): the
        # values are taken at evenly spaced points, the row's own slope across the gap.
        even = np.linspace(p[0], p[-1], p.size)
        with np.errstate(over="ignore", invalid="ignore"):  # losses near the type's range
            g = f - (f[-1] - f[0]) / (p[-1] - p[0]) * (p - even)
            fourth = np.diff(g, n=4)
            top = float(np.max(np.abs(fourth)))
            rms = top * float(np.sqrt(np.mean((fourth / top) ** 2))) if 0.0 < top < np.inf else top
        worst = max(worst, SPREADS * rms / float(np.sqrt(FOURTH_VARIANCE)))
    return max(worst, eps * float(np.max(np.abs(values))))


__all__ = ["measured_rounding", "on_measured_rounding"]
