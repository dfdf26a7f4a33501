"""Finding the wrong coordinates behind a failed directional check, by group testing.

The discrepancy y of a direction u over a set S is the sum of the discrepancies of its
halves, so one directional check of the first half also gives the second (y - y1, whose
bound is the sum of both bounds). Halves whose discrepancy is significant are split again,
so k wrong coordinates among N are found with about k log2(N) checks; sets of LEAF
coordinates or fewer are handed back as candidates for a coordinate-wise check, which
confirms or clears each of them. A half whose own check is kinked, or has no finite bound,
is split without trusting its share.

Bounds add up along the derived halves. Where a significant set splits into two halves
neither of which is significant, the second half is measured on its own (a bound that does
not carry its parent's); where neither is significant even then, the discrepancy is spread
over the set more thinly than the checks resolve, and the set is handed back as undecided.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from .directions import DIRECTION_SIGNIFICANCE as SIGNIFICANCE
from .directions import check_direction
from .drawn import Vector
from .probe import TensorProbe

LEAF = 2
HALF_ROWS = 2  # a half's share needs less than the first direction's ladder (more if its bound asks)
MAX_CANDIDATES = 64  # stop splitting once this many candidates are found
BUDGET = 1500  # forward evaluations one localisation may spend
PRECISION = 2.0 * SIGNIFICANCE  # a half is measured to a bound this many times below its parent's share


@dataclass(frozen=True)
class Located:
    candidates: np.ndarray  # flat indices to confirm coordinate-wise
    evaluations: int
    undecided: tuple[tuple[int, int], ...] = ()  # flat ranges whose share no check resolved


def locate(probe: TensorProbe, u: Vector, discrepancy: float, error: float) -> Located:
    """Candidates for the wrong coordinates of the probed tensor whose direction ``u``
    showed ``discrepancy`` +- ``error``."""
    start = probe.evaluator.count
    stack: list[tuple[int, int, float, float]] = [(0, probe.size, discrepancy, error)]
    found: list[np.ndarray] = []
    undecided: list[tuple[int, int]] = []

    def measured(lo: int, hi: int, y: float) -> tuple[float, float, bool]:
        check = check_direction(probe, slice(lo, hi), u[lo:hi], rows=HALF_ROWS,
                                enough=abs(y) / PRECISION)
        # A share with no finite bound is no evidence either way: split like a kinked one.
        return check.discrepancy, check.error, check.kink or not np.isfinite(check.error)

    while stack:
        lo, hi, y, err = stack.pop()
        if hi - lo <= LEAF:
            found.append(np.arange(lo, hi, dtype=np.int64))
            continue
        if probe.evaluator.count - start > BUDGET or sum(f.size for f in found) >= MAX_CANDIDATES:
            undecided.append((lo, hi))
            undecided.extend((a, b) for a, b, _, _ in stack)
            break
        mid = (lo + hi) // 2
        y1, e1, kink = measured(lo, mid, y)
        y2, e2 = y - y1, err + e1
        if not kink and abs(y1) <= SIGNIFICANCE * e1 and abs(y2) <= SIGNIFICANCE * e2:
            # Neither half stands out though their sum did: the second half on its own.
            y2, e2, kink = measured(mid, hi, y)
            if not kink and abs(y1) <= SIGNIFICANCE * e1 and abs(y2) <= SIGNIFICANCE * e2:
                undecided.append((lo, hi))
                continue
        for (a, b), yh, eh in (((mid, hi), y2, e2), ((lo, mid), y1, e1)):
            if kink or abs(yh) > SIGNIFICANCE * eh:
                stack.append((a, b, yh, eh))
    candidates = np.unique(np.concatenate(found)) if found else np.empty(0, dtype=np.int64)
    return Located(candidates, probe.evaluator.count - start, tuple(undecided))
