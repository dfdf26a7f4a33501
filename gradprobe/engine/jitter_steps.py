"""The moves and differences point.Point's jitter is measured with, each built in one array in
the tensor's own type where that is exact: the same numbers as written out on float64 copies,
without their full-size temporaries."""

from __future__ import annotations

import numpy as np

from .sampling import random_negative


def jitter_step(x: np.ndarray, ulps: float, rng: np.random.Generator, grid: np.dtype | None) -> np.ndarray:
    """``ulps`` units of ``x``'s grid (or of ``grid`` where coarser), at random signs, in
    ``x``'s own type: a power of two times a small whole number, exact there."""
    negative = random_negative(rng, x.shape)  # rng.choice([-1.0, 1.0]) < 0, drawn in chunks
    step = np.asarray(np.abs(x))  # one array of the tensor's size, made the step in place
    np.spacing(step, out=step)
    if grid is not None and np.finfo(grid).eps > np.finfo(x.dtype).eps:  # the grid it computes on
        step = np.maximum(step, np.abs(np.spacing(np.abs(x).astype(grid))).astype(x.dtype))
    step = np.asarray(step)  # a 0-d tensor's too, so the sign is set in place
    step *= ulps
    np.negative(step, out=step, where=negative)
    return step


def second_difference(g: np.ndarray, mid: np.ndarray, first: np.ndarray) -> np.ndarray:
    """|g - 2 mid + first| in float64, flat, in one array: the same operations in the same
    order as on float64 copies of the three (-2 mid is exact, and a + (-b) is a - b)."""
    out = np.multiply(mid, -2.0, dtype=np.float64).reshape(-1)
    out += g.reshape(-1)
    out += first.reshape(-1)
    return np.abs(out, out=out)


BLOCK = 1 << 16  # values a block at a time: temporaries of a block, never of a whole tensor


def largest_second_difference(most: np.ndarray | None, g: np.ndarray, mid: np.ndarray,
                              first: np.ndarray) -> np.ndarray:
    """``most`` raised to :func:`second_difference` (g, mid, first) where that is larger, a
    block at a time (a new flat float64 array when ``most`` is None): the same values as the
    whole-size difference and ``np.maximum``, with no whole-size temporary."""
    g, mid, first = (np.asarray(v).reshape(-1) for v in (g, mid, first))
    out = np.empty(g.size, dtype=np.float64) if most is None else most
    for start in range(0, g.size, BLOCK):
        part = slice(start, start + BLOCK)
        second = second_difference(g[part], mid[part], first[part])
        if most is None:
            out[part] = second
        else:
            np.maximum(out[part], second, out=out[part])
    return out


def moved_point(x: np.ndarray, k: int, ulps: float, rng: np.random.Generator,
                grid: np.dtype | None) -> np.ndarray:
    """x + k d in ``x``'s type, d the :func:`jitter_step` that ``rng`` draws, in the step's own
    array: k d is exact there, and the sum rounds once (as the float64 sum cast back did).
    The step is drawn again for every k (the same draws from a fresh generator), so it is
    never held beside the moved point."""
    moved = jitter_step(x, ulps, rng, grid)
    np.multiply(moved, k, out=moved, dtype=moved.dtype)
    moved += x
    return moved
