"""Telling a kink (ReLU at 0, |r| at 0, a tie in a max) from a smooth coordinate.

For smooth f the one-sided slopes differ by about h |f''|, so halving the step halves the
gap; at a kink they differ by a jump that does not shrink. A kink inside the step, at a
distance d from the point, gives a gap of J (1 - d/h) and moves the central difference by
J d / (2h) between the two steps; either departure from smooth behaviour marks a kink.
An analytic value between the one-sided slopes is a valid subgradient there.
"""

from __future__ import annotations

import numpy as np

from .differences import Slopes

GAP_SUSPECT = 0.1  # one-sided slopes 10% apart cannot come from curvature at these steps
CENTRAL_SHARE = 0.05  # a kink inside the step moves the central difference by >= 5% of the gap


def gap_suspects(s: Slopes, floor: float) -> np.ndarray:
    """Coordinates whose one-sided slopes differ far more than curvature at step h explains."""
    size = np.maximum(np.maximum(np.abs(s.left), np.abs(s.right)), floor)
    return np.abs(s.gap) > GAP_SUSPECT * size


def classify(
    wide: Slopes, narrow: Slopes, analytic: np.ndarray, tol: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """(at_kink, consistent) per coordinate, from slopes at steps h (wide) and h/2 (narrow).

    ``tol`` is the absolute tolerance of each coordinate (threshold times its scale).
    """
    margin = tol + 4.0 * np.maximum(wide.noise, narrow.noise)
    jump = np.abs(wide.gap) > margin
    not_halving = np.abs(narrow.gap - 0.5 * wide.gap) > 0.25 * np.abs(wide.gap) + margin
    # For smooth f the central difference moves by ~h**2 |f'''|, a vanishing fraction of the
    # gap h |f''|; a kink inside the step moves it by a fixed fraction of the jump.
    share = CENTRAL_SHARE * np.abs(wide.gap)
    central_moved = np.abs(narrow.central - wide.central) > share + margin
    at_kink = jump & (not_halving | central_moved)
    sides = np.stack([wide.left, wide.right, narrow.left, narrow.right])
    low = sides.min(axis=0) - margin
    high = sides.max(axis=0) + margin
    consistent = (analytic >= low) & (analytic <= high)
    return at_kink, consistent
