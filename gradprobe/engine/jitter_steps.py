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
    step = np.spacing(np.abs(x).astype(x.dtype))
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
