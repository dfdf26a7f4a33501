"""What one-sided derivatives show about a kink, as predicates on estimates.

A kink verdict rests on evidence (see :mod:`.kinks`): the sides differ beyond their bounds
and the threshold (:func:`apart`), or their quotients crossed kinks among the ladder's steps
(:func:`crossed`) and their values lie further apart than a corner within the steps could set
them (:func:`cornered`); and the analytic value is one a kink between them could give
(:func:`within_kink`). A value one side could give, where the sides are not told apart
(:func:`near_a_side`), is undecided rather than a kink.
"""

from __future__ import annotations

import numpy as np

from .ladder import Estimate
from .refine import Ladder
from .verdict import SIGNIFICANCE


def apart(left: Estimate, right: Estimate, tol: np.ndarray) -> np.ndarray:
    """The one-sided derivatives differ beyond SIGNIFICANCE times their bounds and ``tol``:
    evidence of a jump in the derivative (a side with an infinite bound shows none)."""
    with np.errstate(invalid="ignore"):
        return np.abs(right.value - left.value) > SIGNIFICANCE * (left.error + right.error) + tol


def near_a_side(a: np.ndarray, left: Estimate, right: Estimate, tol: np.ndarray) -> np.ndarray:
    """The analytic value agrees with one side within ``tol`` and SIGNIFICANCE of its bound."""
    with np.errstate(invalid="ignore"):
        return ((np.abs(a - left.value) <= tol + SIGNIFICANCE * left.error)
                | (np.abs(a - right.value) <= tol + SIGNIFICANCE * right.error))


def between(a: np.ndarray, left: Estimate, right: Estimate, tol: np.ndarray) -> np.ndarray:
    """The analytic value lies between the sides, within ``tol`` and SIGNIFICANCE of the
    larger bound."""
    margin = tol + SIGNIFICANCE * np.maximum(left.error, right.error)
    return (a >= np.minimum(left.value, right.value) - margin) & (a <= np.maximum(left.value, right.value) + margin)


def kink_evidence(a: np.ndarray, left: Estimate, right: Estimate, tol: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Where a value the one-sided evidence does not pass is a kink, and where undecided.
    A kink: the sides are seen to differ (:func:`apart`) and the value is one a kink between
    them could give (:func:`within_kink`). Undecided: the sides are not seen to differ, yet
    the value agrees with one of them within its bound (a side too uncertain to tell a kink
    from none). Elsewhere the value lies off both sides, which agree with each other as far
    as their bounds tell: no kink explains it."""
    differ = apart(left, right, tol)
    return differ & within_kink(a, left, right, tol), ~differ & near_a_side(a, left, right, tol)


def within_kink(a: np.ndarray, left: Estimate, right: Estimate, tol: np.ndarray) -> np.ndarray:
    """The analytic value is one a kink between these one-sided derivatives could give: between
    them, or, where several kinks meet at the point, between 0 and their sum (see below)."""
    margin = tol + SIGNIFICANCE * np.maximum(left.error, right.error)
    total = left.value + right.value
    low = np.minimum(np.minimum(left.value, right.value), np.minimum(total, 0.0)) - margin
    high = np.maximum(np.maximum(left.value, right.value), np.maximum(total, 0.0)) + margin
    return (a >= low) & (a <= high)


def cornered(ladder: Ladder) -> np.ndarray:
    """How far apart a corner (a jump of f'' only) within the ladder's smallest step can set
    the sides' extrapolations: the ladder's corner reach (:func:`.refine.corner_reach`)."""
    if ladder.corner_reach is None:
        return np.zeros(ladder.smallest.shape)
    return np.nan_to_num(ladder.corner_reach, nan=np.inf)


def crossed(ladder: Ladder) -> tuple[np.ndarray, np.ndarray]:
    """Whether each side's quotients crossed a kink among the ladder's steps."""
    none = np.zeros(ladder.smallest.shape, dtype=bool)
    return (none if ladder.left_crossed is None else ladder.left_crossed,
            none if ladder.right_crossed is None else ladder.right_crossed)
