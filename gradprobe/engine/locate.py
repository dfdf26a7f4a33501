"""Finding the wrong coordinates behind a failed directional check, by group testing.

The discrepancy y of a direction u over a set S is the sum of the discrepancies of its
halves, so one directional check of the first half also gives the second (y - y1). Halves
whose discrepancy is significant are split again, so k wrong coordinates among N are found
with about k log2(N) checks; sets of LEAF coordinates or fewer are handed back as
candidates for a coordinate-wise check, which confirms or clears each of them. A half whose
own check is kinked is split without trusting its share.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .directions import DIRECTION_SIGNIFICANCE, check_direction
from .probe import TensorProbe

LEAF = 2
HALF_ROWS = 2  # a half's share needs less than the first direction's ladder
MAX_CANDIDATES = 64  # stop splitting once this many candidates are found
BUDGET = 1500  # forward evaluations one localisation may spend


@dataclass(frozen=True)
class Located:
    candidates: np.ndarray  # flat indices to confirm coordinate-wise
    evaluations: int


def locate(probe: TensorProbe, u: np.ndarray, discrepancy: float, error: float) -> Located:
    """Candidates for the wrong coordinates of the probed tensor whose direction ``u``
    showed ``discrepancy`` +- ``error``."""
    start = probe.evaluator.count
    stack: list[tuple[int, int, float, float]] = [(0, probe.size, discrepancy, error)]
    found: list[np.ndarray] = []
    while stack:
        lo, hi, y, err = stack.pop()
        if hi - lo <= LEAF:
            found.append(np.arange(lo, hi, dtype=np.int64))
            continue
        if probe.evaluator.count - start > BUDGET or sum(f.size for f in found) >= MAX_CANDIDATES:
            break
        mid = (lo + hi) // 2
        part = slice(lo, mid)
        check = check_direction(probe, part, u[lo:mid], rows=HALF_ROWS,
                                enough=abs(y) / (4 * DIRECTION_SIGNIFICANCE))
        y1, e1 = check.discrepancy, check.error
        y2, e2 = y - y1, err + e1
        for (a, b), yh, eh in (((mid, hi), y2, e2), ((lo, mid), y1, e1)):
            if check.kink or abs(yh) > DIRECTION_SIGNIFICANCE * eh:
                stack.append((a, b, yh, eh))
    candidates = np.unique(np.concatenate(found)) if found else np.empty(0, dtype=np.int64)
    return Located(candidates, probe.evaluator.count - start)
