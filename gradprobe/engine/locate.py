"""Finding the wrong coordinates behind a failed directional check, by group testing.

The discrepancy y of a direction u over a set S is the sum of the discrepancies of its
halves, so one directional check of the first half also gives the second (y - y1). Halves
whose discrepancy is significant are split again, so k wrong coordinates among N are found
with about k log2(N) checks; sets of LEAF coordinates or fewer are handed back as
candidates for a coordinate-wise check, which confirms or clears each of them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .directions import SIGNIFICANCE, slope
from .evaluate import Evaluator

LEAF = 2
MAX_CANDIDATES = 64  # stop splitting once this many candidates are found
BUDGET = 1000  # forward evaluations one localisation may spend


@dataclass(frozen=True)
class Located:
    candidates: np.ndarray  # flat indices to confirm coordinate-wise
    evaluations: int
    complete: bool  # False when the budget or the candidate limit stopped the search


def locate(
    evaluator: Evaluator, tensor: str, x: np.ndarray, a: np.ndarray, u: np.ndarray,
    discrepancy: float, error: float, compute_dtype: np.dtype, f0: float,
) -> Located:
    """Candidates for the wrong coordinates of a tensor (flat values ``x``, analytic ``a``)
    whose direction ``u`` showed ``discrepancy`` +- ``error``."""
    start = evaluator.count
    stack = [(np.arange(x.size, dtype=np.int64), discrepancy, error)]
    found: list[np.ndarray] = []
    complete = True
    while stack:
        group, y, err = stack.pop()
        if group.size <= LEAF:
            found.append(group)
            continue
        if evaluator.count - start > BUDGET or sum(f.size for f in found) >= MAX_CANDIDATES:
            complete = False
            break
        first, second = group[: group.size // 2], group[group.size // 2 :]
        part = slope(evaluator, tensor, first, x[first], a[first], [u[first]], compute_dtype, f0,
                     tolerance=SIGNIFICANCE * err)
        y1, e1 = float(part.discrepancy[0]), float(part.error[0])
        y2, e2 = y - y1, err + e1
        for half, yh, eh in ((second, y2, e2), (first, y1, e1)):
            if abs(yh) > SIGNIFICANCE * eh:
                stack.append((half, yh, eh))
    candidates = np.unique(np.concatenate(found)) if found else np.empty(0, dtype=np.int64)
    return Located(candidates, evaluator.count - start, complete)
