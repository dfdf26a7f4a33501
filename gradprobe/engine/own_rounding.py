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
tensor (as many as the ladders re-estimate); :mod:`.own_judged` judges them again with it.
Where the loss kept its value at every step taken on one side, the rounding the moving
side's row shows is kept for that side (a level row says nothing of its own rounding,
:func:`_beside_flat`).
"""

from __future__ import annotations

import numpy as np

from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_ROWS
from .probe import TensorProbe
from .widened import as_seen

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
OUTLIER = 4.0  # a row showing more than this many times the quietest row's figure is measured again
FINER_BY = 8.0  # that many times nearer together


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
    todo, w = np.arange(n), widest_steps(probe, flat)
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
    rows = np.array([[_measured(values[i].reshape(3, JITTER)[r:r + 1], where[i].reshape(3, JITTER)[r:r + 1], eps)
                      for r in range(3)] for i in range(n)]).reshape(n, 3)
    spoke = np.isfinite(rows[:, 0])
    rows = _finer_rows(probe, flat, widest, delta, rows, eps)
    rounding = np.where(np.isfinite(rows).all(axis=1), rows.max(axis=1), np.nan)
    same = values == probe.f0  # (n, 3 * JITTER): rows at the point, at +widest, at -widest
    half = JITTER // 2
    right = same[:, half:JITTER].all(axis=1) & same[:, JITTER:2 * JITTER].all(axis=1)
    left = same[:, :half + 1].all(axis=1) & same[:, 2 * JITTER:].all(axis=1)
    beside = np.full(n, np.nan)
    for j in np.flatnonzero(right ^ left).tolist():
        beside[j] = _beside_flat(values[j].reshape(3, JITTER), where[j].reshape(3, JITTER), 2 if right[j] else 1, eps)
    return rounding, spoke, widest + offsets[-1] * delta, right.astype(np.int8) + left.astype(np.int8), beside


def _finer_rows(probe: TensorProbe, flat: np.ndarray, widest: np.ndarray, delta: np.ndarray, rows: np.ndarray,
                eps: float) -> np.ndarray:
    """The rows' figures ``rows`` (a row per centre: the point, +widest, -widest) with each row
    whose figure is more than OUTLIER times the smallest of its coordinate's measured again
    FINER_BY times nearer together (moves still at least the change of CHANGE_ULPS units of
    the loss's last place the analytic gradient predicts, else it stays): rounding varies
    little over the moves, what the loss does along the row does not (a kink among its
    points, the loss's higher terms past the cubic), and a row that shows far more than the
    others shows that. The finer row's figure replaces the coarser where smaller."""
    least = np.where(np.isfinite(rows), rows, np.inf).min(axis=1)
    with np.errstate(invalid="ignore", over="ignore"):
        outlier = np.isfinite(rows) & np.isfinite(least)[:, None] & (rows > OUTLIER * least[:, None])
    slope = np.maximum(np.abs(probe.a[flat]), 1e-300)
    finer = delta / FINER_BY
    outlier &= (finer >= CHANGE_ULPS * eps * abs(probe.f0) / slope)[:, None]
    out = rows.copy()
    x = probe.x[flat]
    offsets = np.arange(JITTER) - (JITTER - 1) / 2.0
    for r, centre in enumerate((0.0, 1.0, -1.0)):
        todo = np.flatnonzero(outlier[:, r])
        if todo.size == 0:
            continue
        points, seen = [], []
        with np.errstate(over="ignore", invalid="ignore"):
            for k in offsets:
                moved = (x[todo].astype(np.float64) + centre * widest[todo] + k * finer[todo]).astype(x.dtype)
                points.append(moved)
                seen.append(as_seen(moved, probe.compute_dtype))
        values = probe.evaluator.single_moves(probe.tensor, flat[todo], tuple(points))
        at = np.stack(seen, axis=1)
        for j, i in enumerate(todo.tolist()):
            figure = _measured(values[j][None, :], at[j][None, :], eps)
            if np.isfinite(figure) and figure < out[i, r]:
                out[i, r] = figure
    return out


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


def widest_steps(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
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


__all__ = ["MEASURED", "REACH_SLACK", "own_rounding", "widest_steps"]
