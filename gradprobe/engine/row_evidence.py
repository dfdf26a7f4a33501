"""What a ladder's own rows show of the loss along a coordinate, beyond their rounding: a
first-order rate (corners within the steps), the smooth model's rate, the curvature. Pure:
read from the pairs the ladder took."""

from __future__ import annotations

import numpy as np

from .ladder import NOISE_UNITS, at_model_rate
from .probe import TensorProbe
from .refine import RATIO, Ladder

FIRST_ORDER = 0.375  # a change shrinking less than this per halving: first order (1/2), not h**2 (1/4)


def central_rows(ladder: Ladder, which: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The central quotients of the ladder's rows (rows, len(which)) at positions ``which``,
    and each one's rounding."""
    assert ladder.pairs is not None
    p, n = ladder.pairs, ladder.smallest.size
    rows = p.f_plus.size // n
    q = p.central.reshape(rows, n)[:, which]
    noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, n)[:, which]
    return q, noise


def _changes(ladder: Ladder, which: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The rows' quotients and rounding, their changes, and which changes stand above the
    rounding of the two quotients."""
    q, noise = central_rows(ladder, which)
    with np.errstate(over="ignore", invalid="ignore"):
        change = np.diff(q, axis=0)
        above = np.abs(change) > 2 * NOISE_UNITS * (noise[1:] + noise[:-1])
    return q, noise, change, above


def first_order_rows(ladder: Ladder, which: np.ndarray) -> np.ndarray:
    """Per coordinate ``which`` of the ladder: two successive changes of its central
    quotients, each above their rounding, shrink at a first-order rate (by more than
    FIRST_ORDER per halving of the step, where a smooth loss's shrink by 1/4): f'' jumps
    within the steps (corners)."""
    _, _, change, above = _changes(ladder, which)
    with np.errstate(over="ignore", invalid="ignore"):
        size = np.abs(change)
        slow = above[1:] & above[:-1] & (size[1:] > FIRST_ORDER * size[:-1])
    return slow.any(axis=0)


def curvature_seen(probe: TensorProbe, ladder: Ladder, which: np.ndarray) -> np.ndarray:
    """Per coordinate ``which`` of the ladder: the largest second difference its rows show
    beyond their rounding (the curvature the loss is seen to have over its steps)."""
    assert ladder.pairs is not None
    p, n = ladder.pairs, ladder.smallest.size
    rows = p.f_plus.size // n
    width = (0.5 * (p.h_plus + p.h_minus)).reshape(rows, n)[:, which]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        second = np.abs(p.f_plus + p.f_minus - 2 * probe.f0).reshape(rows, n)[:, which]
        seen = (second - 4 * p.noise.reshape(rows, n)[:, which]) / width**2
    return np.nan_to_num(np.maximum(seen, 0.0), nan=0.0).max(axis=0)


def smooth_rows(ladder: Ladder, which: np.ndarray) -> np.ndarray:
    """Per coordinate ``which`` of the ladder: two successive changes of its central quotients
    stand above their rounding and the later is the earlier times the smooth model's rate
    (:func:`.ladder.at_model_rate`), or the rows stay within their rounding all along.
    Rows that move beyond it, each change within the rounding or at no model rate, never
    showed the loss smooth on their steps: below a ladder that crossed kinks, their estimate
    is one the kinks still closer may move (kinks-570781: absolute values' residuals at every
    distance down to 1e-10, the quotients moving by 1e-3 in all over the rows, their last
    changes within the rounding, the estimate taken there 2e-3 off the true derivative with
    a bound of 1.7e-4)."""
    q, noise, change, above = _changes(ladder, which)
    with np.errstate(invalid="ignore", over="ignore"):
        # Rows that stay within their rounding all along (a loss linear between kinks) show
        # the model as plainly as any rate.
        seen = np.ptp(q, axis=0) <= 2 * NOISE_UNITS * noise.max(axis=0)
        for k in range(1, change.shape[0]):
            seen |= above[k] & above[k - 1] & at_model_rate(change[k], change[k - 1], RATIO**-2,
                                                              noise[k + 1] + noise[k] + noise[k - 1])
    return seen
