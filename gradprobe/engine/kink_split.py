"""The elements whose kinks at the point hide every random direction, found by splitting.

A kink exactly at the point (an L1 penalty on a weight that is 0, a ReLU whose input is 0)
is crossed by every step along every direction that moves its element, however small the
step: every random direction over the tensor is then kinked and shows nothing, and one wrong
element anywhere else would pass unseen. Such kinks are few in most tensors, so they are found
the way localisation finds wrong elements: a kinked direction's part is split in halves, each
half's own direction (the part scaled to unit length) is tested for a kink with the same
ladders as a direction's check (:func:`.directions.kink_ladders`), and only
kinked halves are split again. k kinked elements among N cost about 2 k log2(N) tests; the
elements found are handed back, to be checked coordinate-wise (the kink logic judges them)
and left out of the directions drawn after (:func:`.drawn.without`), which are smooth again.
Where kinks are too many for the budget, the split says so and the directions stay blind.
"""

from __future__ import annotations

import numpy as np

from ..common.classes import dataclass
from .directions import kink_ladders
from .drawn import Vector, unit_part
from .probe import TensorProbe

TEST_ROWS = 3  # the rows of a direction's check: its one-sided tableaux need three for a bound
BUDGET = 2500  # forward evaluations one split may spend


@dataclass(frozen=True)
class KinkSplit:
    kinked: np.ndarray  # flat indices of the elements whose own direction is kinked
    complete: bool  # every kinked part was split down to its elements within the budget
    evaluations: int


def _kinked(probe: TensorProbe, lo: int, hi: int, u: Vector) -> bool:
    v = unit_part(u, lo, hi)
    return kink_ladders(probe, slice(lo, hi), v, TEST_ROWS)[0]


def split_kinks(probe: TensorProbe, u: Vector, budget: int = BUDGET) -> KinkSplit:
    """The elements behind the kinks of the probed tensor's kinked direction ``u``."""
    start = probe.evaluator.count
    stack = [(0, probe.size)]
    found: list[int] = []
    while stack:
        lo, hi = stack.pop()
        if hi - lo == 1:
            found.append(lo)
            continue
        if probe.evaluator.count - start > budget:
            return KinkSplit(np.array(found, dtype=np.int64), False, probe.evaluator.count - start)
        mid = (lo + hi) // 2
        # A part kinked as a whole and smooth in each half (a kink that needs both halves
        # moved at once, or one a step away) is not split further: the directions drawn
        # after show whether what is left is smooth.
        stack.extend((a, b) for a, b in ((mid, hi), (lo, mid)) if _kinked(probe, a, b, u))
    return KinkSplit(np.array(sorted(found), dtype=np.int64), True, probe.evaluator.count - start)
