"""Settling a coordinate on the levels its steps climbed through, with one more pair at most.

A coordinate whose first pair leaves a hundredth of the threshold to rounding noise climbs:
pairs at steps 16, 256, ... times the first, as far as the loss is seen to stay smooth
(:func:`.steps.largest_smooth_step`), and a ladder from the top level then comes down
through the level below it. The levels are themselves a ladder whose steps shrink 16-fold
per row, already evaluated. Their central quotients, extrapolated in even powers of the step
over Richardson's tableau (:func:`.ladder.tableau`, ratio 16: every column used must be seen
to change at its model's rate, 1/256 per row for the quotients, and each further row must
fall where the estimate predicts), bound the derivative. Where

- there are at least four levels, the first pair's among them (the rate at the third row
  lets the tableau use the quotients of the larger steps, below the noise of the first; a
  climb that stopped one level short takes that level's pair, within the params' scale),
- the one-sided quotients' gap grows 16-fold from each level to the next, as a smooth loss's
  does (h f'' to leading order): no kink among the steps,
- the analytic value agrees with the estimate to SETTLE_FRACTION of the threshold, as a first
  pair settles a coordinate, and that agreement plus twice the bound is within the threshold,

the coordinate passes on the levels (its error is then bounded by far less than the
threshold); the others go down the ladder as before. Plain float64 code only (narrow
arithmetic and its float64 runs keep their own rules).
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import is_narrow
from .ladder import NOISE_UNITS, Estimate, tableau
from .probe import Pairs, TensorProbe
from .refine import Taken, pairs_reusing
from .steps import GAP_SUSPECT, SETTLE_FRACTION

LEVEL_RATIO = 16.0  # the climb's levels: steps 16**l times the first
MIN_LEVELS = 4  # the first pair and three levels above it: the tableau's rate at its third row
MOVED_SLACK = 0.01  # a level counts only where both sides moved its step to within 1%
GAP_SLACK = GAP_SUSPECT  # the sides' gap may grow 16-fold to within 10%


def _lookup(taken: list[Taken], flat: np.ndarray, steps: np.ndarray) -> tuple[Pairs, np.ndarray]:
    """The pairs ``taken`` at (flat, steps), and where one was found (NaN elsewhere): never
    an evaluation."""
    seen: dict[tuple[int, float], tuple[int, int]] = {}
    for j, (where, asked, _) in enumerate(taken):
        for k, key in enumerate(zip(where.tolist(), asked.tolist())):
            seen.setdefault(key, (j, k))
    fields = [np.full(flat.size, np.nan) for _ in range(5)]
    found = np.zeros(flat.size, dtype=bool)
    for i, key in enumerate(zip(flat.tolist(), steps.tolist())):
        at = seen.get(key)
        if at is not None:
            found[i] = True
            for mine, old in zip(fields, taken[at[0]][2].fields()):
                mine[i] = old[at[1]]
    return Pairs(*fields), found


def _levels(start: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Per coordinate, how many 16-fold levels above ``h`` its ladder starts at (-1 where the
    start is not such a level)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        level = np.log(start / h) / np.log(LEVEL_RATIO)
    whole = np.isfinite(level) & (level >= 0.5) & (np.abs(level - np.round(level)) < 1e-9)
    return np.where(whole, np.round(level), -1).astype(np.int64)


def _one_level_more(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, top: np.ndarray,
                    taken: list[Taken], suspects: np.ndarray) -> np.ndarray:
    """``top`` with the climbs that stopped one level short of MIN_LEVELS taken one level
    higher where that step stays within the params' own scale (the climb's own limit) and
    the levels could then settle the coordinate: one pair each, added to ``taken``."""
    short = np.flatnonzero((top == MIN_LEVELS - 2) & ~suspects)
    if short.size == 0:
        return top
    steps = h[short] * LEVEL_RATIO ** (MIN_LEVELS - 1)
    scale = np.maximum(np.abs(probe.x[flat[short]].astype(np.float64)), probe.x_scale)
    # Not spent where the levels cannot settle it: the extrapolation from the two levels
    # taken lies beyond the tolerance from the analytic value (a tableau entry that agrees to
    # a hundredth of it would then have a bound far wider), or the least bound an entry at
    # the 16-fold level can have (twice its quotient's rounding), twice over, leaves no room.
    below = [_lookup(taken, flat[short], h[short] * LEVEL_RATIO**k)[0] for k in (1, 2)]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        q1, q2 = below[0].central, below[1].central
        extrapolated = q1 + (q1 - q2) / (LEVEL_RATIO**2 - 1.0)
        least = NOISE_UNITS * 2 * below[0].noise / (below[0].h_plus + below[0].h_minus)
        tol = probe.tolerance(flat[short], extrapolated)
        can = (np.abs(probe.a[flat[short]] - extrapolated) <= tol) & (2.0 * least <= tol)
    within = (steps <= scale) & can
    short, steps = short[within], steps[within]
    if short.size == 0:
        return top
    got = pairs_reusing(probe, flat[short], steps, taken)
    taken.append((flat[short], steps, got))
    top = top.copy()
    top[short] = MIN_LEVELS - 1
    return top


def settled_on_levels(
    probe: TensorProbe, flat: np.ndarray, h: np.ndarray, start: np.ndarray, taken: list[Taken],
    suspects: np.ndarray,
) -> tuple[np.ndarray, Estimate]:
    """Which of ``flat`` (first steps ``h``, ladders due to start at ``start``) pass on the
    levels their climb took (pairs ``taken``), and the estimates they pass on (bound inf
    elsewhere). ``suspects``: coordinates whose first pair flagged a kink (never settled)."""
    n = flat.size
    passed = np.zeros(n, dtype=bool)
    value, error = np.full(n, np.nan), np.full(n, np.inf)
    if n == 0 or is_narrow(probe.compute_dtype) or probe.narrow is not None or probe.own_code is not None:
        return passed, Estimate(value, error)
    top = _levels(start, h)
    top = _one_level_more(probe, flat, h, top, taken, suspects)
    for levels in sorted(set(top[top >= MIN_LEVELS - 1].tolist())):  # np.unique loads numpy.ma
        which = np.flatnonzero((top == levels) & ~suspects)
        if which.size == 0:
            continue
        rows = levels + 1  # largest step first
        steps = np.concatenate([h[which] * LEVEL_RATIO ** (levels - k) for k in range(rows)])
        p, found = _lookup(taken, np.tile(flat[which], rows), steps)
        m = which.size
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            moved = ((np.abs(p.h_plus - steps) <= MOVED_SLACK * steps)
                     & (np.abs(p.h_minus - steps) <= MOVED_SLACK * steps))
            usable = (found & moved).reshape(rows, m).all(axis=0)
            q = p.central.reshape(rows, m)
            noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, m)
            right, left = p.sides(probe.f0)
            gap = (right - left).reshape(rows, m)
            side_noise = (4 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(rows, m)
            # From each level to the next larger one the gap grows 16-fold (within the slack
            # and the noise of both gaps, the smaller step's scaled up with it).
            grows = np.abs(gap[:-1] - LEVEL_RATIO * gap[1:]) <= GAP_SLACK * np.abs(gap[:-1]) \
                + NOISE_UNITS * (side_noise[:-1] + LEVEL_RATIO * side_noise[1:])
            smooth = grows.all(axis=0) & np.all(np.isfinite(q), axis=0)
        est = tableau(np.nan_to_num(q), noise, LEVEL_RATIO, 2)
        a = probe.a[flat[which]]
        tol = probe.tolerance(flat[which], est.value)
        off = np.abs(a - est.value)
        ok = usable & smooth & np.isfinite(est.error) & (off <= SETTLE_FRACTION * tol) & (off + 2.0 * est.error <= tol)
        passed[which[ok]] = True
        value[which[ok]] = est.value[ok]
        error[which[ok]] = est.error[ok]
    return passed, Estimate(value, error)
