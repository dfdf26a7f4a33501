"""Choosing the steps of a coordinate's numeric derivative from what its first pair showed.

Where rounding noise hides the threshold, steps grow, as far as the loss is seen to stay
smooth (:func:`largest_smooth_step`); where the slope changes on the scale of the step, they
shrink (:func:`start_steps`); one-sided slopes far apart flag a possible kink
(:func:`gap_suspects`).
"""

from __future__ import annotations

import numpy as np

from .probe import Pairs, TensorProbe
from .refine import RATIO, ROWS, Taken, pairs_reusing
from ..common.roundoff import is_narrow

SETTLE_FRACTION = 1e-2  # a first estimate this far inside the threshold settles a coordinate
BEND_LIMIT = 0.05  # the slope may change by 5% across the ladder's first step
MAX_UP = 24  # steps grow at most 2**24-fold to beat rounding noise
GAP_SUSPECT = 0.1  # one-sided slopes 10% apart: look for a kink


def slope_change(probe: TensorProbe, p: Pairs, typical: float | None = None) -> np.ndarray:
    """How much the slope changes across the step, relative to the coordinate's slope (or
    to ``typical`` where that is larger), with the rounding noise of the one-sided slopes
    taken off (0 where noise hides it)."""
    right, left = p.sides(probe.f0)
    size = np.maximum(np.maximum(np.abs(p.central), np.abs(left)),
                      np.maximum(np.abs(right), typical or probe.tensor_floor))
    noise = 4 * p.noise / np.minimum(p.h_plus, p.h_minus)
    with np.errstate(invalid="ignore"):
        change = np.maximum(np.abs(right - left) - noise, 0.0) / size
    # A side that overflowed (an infinite quotient) changes without bound: far smaller steps.
    return np.where(np.isnan(change), np.inf, change)


def steps_down(probe: TensorProbe, first: Pairs) -> np.ndarray:
    """How many halvings of the first step bring the slope's change across it within
    BEND_LIMIT, were the loss to bend the same way at smaller steps (0 where it already is)."""
    bend = slope_change(probe, first)
    return np.clip(np.ceil(np.log2(np.maximum(bend / BEND_LIMIT, 1.0))), 0, 30)


def start_steps(probe: TensorProbe, flat: np.ndarray, first: Pairs, h: np.ndarray,
                taken: list[Taken] | None = None) -> np.ndarray:
    """The ladder's first step, probed: smaller where the slope changes on the scale of
    the step; larger where rounding noise hides the threshold, as far as pairs at steps
    16, 256, ... times larger show the slope still changing by less than BEND_LIMIT (the
    ladder's bounds hold from steps below the scale on which the slope changes). Pairs
    ``taken`` before (by default the first pairs) are not evaluated again; those taken here
    are added to it."""
    down = steps_down(probe, first)
    want = SETTLE_FRACTION * probe.tolerance(flat, first.central)
    noise = 2 * first.noise / (first.h_plus + first.h_minus)
    with np.errstate(over="ignore", divide="ignore"):  # a want of 0: as many halvings as allowed
        up = np.clip(np.ceil(np.log2(np.maximum(8.0 * noise / want, 1.0))), 0, MAX_UP)
    torn = _torn(probe, up, down)
    up[down > 0] = 0
    # A re-estimate for accuracy starts up to 4 steps higher, as far as the slope's change
    # stays small next to the tensor's typical gradient.
    with np.errstate(divide="ignore"):  # an unbounded change (an overflowed side): no room, -inf
        room = np.floor(np.log2(BEND_LIMIT / np.maximum(slope_change(probe, first, probe.grad_scale), 1e-300)))
    start = h * 2.0 ** np.where(down > 0, -down, np.clip(room, 0, 2))
    climbing = np.flatnonzero(up > 2)
    if climbing.size:
        start[climbing] = largest_smooth_step(probe, flat[climbing], h[climbing], up[climbing],
                                              [(flat, h, first)] if taken is None else taken)
    start[torn] = h[torn] * _rise_within_scale(probe, flat[torn], h[torn])
    return start


TORN_RISE = RATIO ** (ROWS - 1)  # the ladder then comes down to the first step


def _torn(probe: TensorProbe, up: np.ndarray, down: np.ndarray) -> np.ndarray:
    """Narrow arithmetic whose rounding noise hides the threshold at the first step while
    the slope bends on the scale of that step: smaller steps only add noise, so the ladder
    starts TORN_RISE steps higher and comes down to the first step; its tableau uses an
    entry only where the quotients are seen to shrink as h**2 on this coordinate
    (ladder.settled_rows), else the bound stays wide."""
    if not is_narrow(probe.compute_dtype):
        return np.zeros(up.shape, dtype=bool)
    return (up > 0) & (down > 0)


def _rise_within_scale(probe: TensorProbe, flat: np.ndarray, h: np.ndarray) -> np.ndarray:
    """TORN_RISE, or for 16-bit arithmetic the largest power of two at most that which keeps
    the ladder's top step within the params' own scale (1 where the first step already
    reaches it): past it the loss along a coordinate is another function (an oscillation
    seen over several periods averages its slope away), and quotients that agree there
    prove nothing. (16-bit steps start near a sixth of max(1, |x|), so a rise of 16 puts
    params of scale 0.1 tens of times beyond it; float32's start 64 times lower, and are
    left as they were.)"""
    if probe.compute_dtype.itemsize > 2:
        return np.full(h.shape, TORN_RISE)
    scale = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    with np.errstate(divide="ignore"):
        room = np.floor(np.log2(np.maximum(scale / h, 1.0)))
    return 2.0 ** np.clip(room, 0.0, np.log2(TORN_RISE))


def largest_smooth_step(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, up: np.ndarray,
                        taken: list[Taken] | None = None) -> np.ndarray:
    """Per coordinate, the largest of h * 16**m (16**m <= 2**up) up to which the loss is
    seen to stay smooth: at every level the slope changes by at most BEND_LIMIT across the
    step, or the second difference agrees with the level below to BEND_LIMIT (a loss
    that is quadratic along the coordinate may grow its steps freely). One batch of pairs,
    at the levels each coordinate may take only (a level it may not take decides nothing),
    those ``taken`` before at the same coordinate and step not evaluated again (the new
    ones are added to ``taken``)."""
    levels = int(np.ceil(up.max() / 4)) + 1
    factors = 16.0 ** np.arange(levels)
    wanted = np.arange(levels)[:, None] * 4 <= up[None, :] + 3
    # Never beyond the params' own scale: past it the loss along a coordinate is another
    # function, and agreement there proves nothing about the derivative at the point.
    x = np.abs(probe.x[flat].astype(np.float64))
    scale = np.maximum(x, probe.x_scale)
    within = h[None, :] * factors[:, None] <= scale[None, :]
    p = _pairs_where(probe, flat, h, factors, wanted & within, taken or [])
    bends = slope_change(probe, p).reshape(levels, flat.size)
    # Steps beyond 1e154 (params that large), or a huge second difference over a tiny step's
    # square: a quotient that overflows is no second difference seen.
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        width = (0.5 * (p.h_plus + p.h_minus)) ** 2
        second = ((p.f_plus - 2 * probe.f0 + p.f_minus) / width).reshape(levels, flat.size)
        second_noise = (4 * p.noise / width).reshape(levels, flat.size)
        steady = np.ones((levels, flat.size), dtype=bool)
        size = np.maximum(np.abs(second[1:]), np.abs(second[:-1]))
        seen = (np.abs(second) > 4.0 * second_noise) & np.isfinite(second) & np.isfinite(second_noise)
        steady[1:] = (np.abs(second[1:] - second[:-1]) <= BEND_LIMIT * size + second_noise[1:] + second_noise[:-1]) \
            & seen[1:] & seen[:-1]
    # Growing needs evidence, not the absence of it: the slope itself must stand above the
    # noise at that level (a loss that looks flat at every step shows nothing either way).
    slope_noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(levels, flat.size)
    seen_slope = np.abs(p.central.reshape(levels, flat.size)) > 4.0 * slope_noise
    calm = (bends <= BEND_LIMIT) | steady  # no sign of a bend (perhaps only as far as noise shows)
    smooth_so_far = np.cumprod(calm, axis=0).astype(bool)
    accepted = smooth_so_far & seen_slope & wanted & within  # the top level must show its slope
    best = np.where(accepted, factors[:, None], 1.0).max(axis=0)
    return h * best


def _pairs_where(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, factors: np.ndarray,
                 need: np.ndarray, taken: list[Taken]) -> Pairs:
    """Pairs at steps ``h * factors[l]`` (levels l by coordinates, row-major), evaluated only
    where ``need`` holds (a level's need implies the lower levels'); NaN losses elsewhere."""
    levels, n = need.shape
    out = Pairs(np.full(levels * n, np.nan), np.full(levels * n, np.nan), np.ones(levels * n),
                np.ones(levels * n), np.full(levels * n, np.nan))
    where = np.flatnonzero(need.reshape(-1))
    if where.size:
        at, steps = np.tile(flat, levels)[where], (factors[:, None] * h[None, :]).reshape(-1)[where]
        got = pairs_reusing(probe, at, steps, taken)
        taken.append((at, steps, got))
        for mine, new in zip(out.fields(), got.fields()):
            mine[where] = new
    return out


def gap_suspects(probe: TensorProbe, flat: np.ndarray, first: Pairs) -> np.ndarray:
    """Per coordinate: the first pair's one-sided slopes lie apart by more than GAP_SUSPECT of
    the larger, beyond their rounding, and by more than the tolerance. Such a pair does not
    settle a coordinate, whatever its central quotient says: a kink may lie within it, or a
    feature far narrower than the step (a pole 1.4e-9 away beneath a step of 2.4e-4: both
    sides fall by the pole's term, their slopes +-1.7e10 against a central quotient of 7e4
    and a true slope of 3e15, steep-73014). A gap within the tolerance is no concern on a
    loss smooth over the step (the central quotient's truncation is then a fraction of it);
    the slopes' size alone, not the target's floor, says whether the gap is large."""
    right, left = first.sides(probe.f0)
    gap = np.abs(right - left)
    size = np.maximum(np.abs(left), np.abs(right))
    noise = 4 * first.noise / np.minimum(first.h_plus, first.h_minus)
    return (gap > GAP_SUSPECT * size + noise) & (gap > probe.tolerance(flat, first.central))
