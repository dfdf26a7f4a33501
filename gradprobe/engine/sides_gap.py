"""What the gap between the one-sided quotients (right minus left, per ladder row) says of
the loss within the steps.

Along a smooth loss the gap is (f(x+h) - 2 f(x) + f(x-h)) / h = f'' h + f'''' h**3 / 12 + ...:
odd in h, one sign at every small step, halving with the step. So the sides' first-order
extrapolations, 2 r(h/2) - r(h) and 2 l(h/2) - l(h), both equal f' - f''' h**2 / 12 to
second order and differ only by 2 g(h/2) - g(h), which vanishes faster than any change of
the central quotients. At a corner at the point (f'' jumping from A to B) the sides are
f' + B h/2 and f' - A h/2, and their extrapolations meet at f' too. A gap that takes both
signs beyond its rounding, or extrapolations that stay apart beyond it, show the steps
crossing kinks or corners within them (kinks-72055: ReLU rows tied at 0 and at 3e-14,
2e-12, 2e-10 away; kinks-71026: Huber corners from 0 to 8e-5 away): the central quotients,
the sides' mean at every row, are then no estimate of f' to better than that disagreement.
"""

from __future__ import annotations

import numpy as np

from .ladder import NOISE_UNITS

KINK_SHRINK = 0.75  # the one-sided gap shrinks to at most this share as the step halves, or a kink
THIRD_ORDER_SLACK = 0.25  # the extrapolations' disagreement shrinks 8-fold per halving: a quarter allowed


def gap_turns(right: np.ndarray, left: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Per coordinate, from the one-sided quotients and the gap's rounding (rows,
    coordinates): the gap takes both signs at rows where it lies beyond 2 NOISE_UNITS times
    its rounding (:func:`takes_both_signs`)."""
    with np.errstate(invalid="ignore", over="ignore"):
        return takes_both_signs(right - left, 2.0 * NOISE_UNITS * noise)


def extrapolations_apart(right: np.ndarray, left: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Per coordinate: how far the sides' first-order extrapolations from the last two rows
    lie apart beyond 2 NOISE_UNITS times their rounding (the gap's rounding ``noise`` per row,
    the extrapolated gap 2 g[-1] - g[-2] carrying twice the last row's and the row before's),
    where that is not the smooth model's own third-order term: along a smooth loss
    2 g(h/2) - g(h) = -f'''' h**3 / 16, which shrinks eightfold as the step halves, and a
    central tableau converged beyond it is no less right for it (a tanh net's quotients are
    good to 1e-11 where the sides' extrapolations part by far more). 0 where the disagreement
    shrank from the rows before to a quarter or less (twice the model's rate), or lies within
    the rounding."""
    with np.errstate(invalid="ignore", over="ignore"):
        gap = right - left
        apart = np.abs(2.0 * gap[-1] - gap[-2])
        room = 2.0 * NOISE_UNITS * (2.0 * noise[-1] + noise[-2])
        excess = np.where(np.isfinite(apart), np.maximum(apart - room, 0.0), np.inf)
        if gap.shape[0] < 3:
            return excess
        before = np.abs(2.0 * gap[-2] - gap[-3])
        return np.where(apart <= THIRD_ORDER_SLACK * before, 0.0, excess)


def takes_both_signs(gap: np.ndarray, room: np.ndarray | float) -> np.ndarray:
    """Per column (rows, coordinates; or one column): the gap takes both signs at rows where it
    lies beyond ``room`` (its rounding, as the caller counts it). Along a smooth loss it is
    f'' h to first order, one sign at every small step; a kink closer than the smallest step
    bends one side at every row while curvature moves the other, and the gap turns
    (kink-near-5055: a kink 1e-7 away, the left quotients held 1.8e-11 while the right grew
    from the analytic 9.2e-12, and the central quotients settled between them)."""
    with np.errstate(invalid="ignore", over="ignore"):
        shown = np.abs(gap) > room
        return np.any(shown & (gap > 0), axis=0) & np.any(shown & (gap < 0), axis=0)


def does_not_halve(gap: np.ndarray, room: np.ndarray | float) -> np.ndarray:
    """Per column (rows ascending in the step): the gap's size ``gap`` does not shrink to
    KINK_SHRINK of itself as the step halves between two consecutive steps where both lie
    beyond ``room`` (curvature makes it shrink in proportion): a kink lies within the smaller
    step, and a window's own checks could pass it where rounding is large."""
    with np.errstate(invalid="ignore", over="ignore"):
        resolved = gap > room
        both = resolved[:-1] & resolved[1:]
        return np.any(both & (gap[:-1] > KINK_SHRINK * gap[1:]), axis=0)


def extrapolations_stay_apart(gap: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Per column (rows ascending in the step, each twice the last; ``noise`` a side's
    rounding per row): at two consecutive steps the sides' first-order extrapolations part,
    by 2 g(h) - g(2 h), beyond 2 NOISE_UNITS times their rounding, and the one at the smaller
    step did not shrink to THIRD_ORDER_SLACK of the other. Along a smooth loss that parting
    is the third-order term, shrinking eightfold per halving; a kink closer to the point than
    every step adds its jump to the gap at each, a share that stays while curvature's halves
    and hides it from :func:`does_not_halve` (bug-transpose-61022: a jump of 1.05e-5 beside
    a gap of 1.6e-5 to 5.7e-4 at steps 4e-3 to 0.5, a kink 1e-9 away, its half read as the
    derivative's error)."""
    with np.errstate(invalid="ignore", over="ignore"):
        parted = np.abs(2.0 * gap[:-1] - gap[1:])
        shown = parted > 2.0 * NOISE_UNITS * (2.0 * noise[:-1] + noise[1:])
        stays = parted[:-1] > THIRD_ORDER_SLACK * parted[1:]
        return np.any(shown[:-1] & shown[1:] & stays, axis=0)

