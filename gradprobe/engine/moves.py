"""Moves of the user's params: which coordinates of which tensor take which values for one
forward call (:class:`Perturbation`), and the light forms the evaluator uses for single
coordinates and whole tensors."""

from __future__ import annotations

import numpy as np

from ..common.classes import dataclass
from ..common.tensors import format_index

# An integer index array at least this long that is one contiguous run becomes a slice.
CONTIGUOUS_MIN = 64


def as_slice(index: np.ndarray) -> slice | None:
    """``index`` as a slice when it is the run ``start, start+1, ..., stop-1``."""
    if index.ndim != 1 or index.size < CONTIGUOUS_MIN:
        return None
    start, last = int(index[0]), int(index[-1])
    if last - start + 1 != index.size or not bool(np.all(np.diff(index) == 1)):
        return None
    return slice(start, last + 1)


@dataclass(frozen=True)
class Perturbation:
    """Set ``tensor.flat[index] = values`` for one forward call.

    ``index`` is a 1-D array of flat indices or, for a contiguous range, a ``slice`` with
    explicit start and stop (step 1): it pickles in a few bytes and is applied by slicing.
    A long contiguous index array is turned into such a slice.
    """

    tensor: str
    index: np.ndarray | slice
    values: np.ndarray  # one value per index, in the tensor's dtype (complex for complex step)

    def __post_init__(self) -> None:
        if isinstance(self.index, np.ndarray):
            run = as_slice(self.index)
            if run is not None:
                object.__setattr__(self, "index", run)

    @property
    def size(self) -> int:
        """How many coordinates change."""
        if isinstance(self.index, slice):
            return int(self.index.stop) - int(self.index.start)
        return int(np.size(self.index))

    def describe(self, shape: tuple[int, ...]) -> str:
        if self.size == 1:
            first = self.index.start if isinstance(self.index, slice) else self.index[0]
            where = tuple(int(i) for i in np.unravel_index(int(first), shape))
            return f"{self.tensor}{format_index(where)}"
        return f"{self.size} coordinates of {self.tensor}"


def covers(p: Perturbation, owner: np.ndarray) -> bool:
    """``p`` sets every element of ``owner`` (a real move of a real tensor)."""
    return (isinstance(p.index, slice) and p.index.start == 0 and p.index.stop == owner.size
            and p.values.dtype.kind != "c" and owner.dtype.kind != "c")


def whole_view(p: Perturbation, owner: np.ndarray) -> np.ndarray:
    view = np.asarray(p.values, dtype=owner.dtype).reshape(owner.shape).view()
    view.flags.writeable = False
    return view


class One:
    """One coordinate of ``tensor`` moved to ``values[i]`` (a :class:`Perturbation` is made
    only where a message names it)."""

    __slots__ = ("tensor", "flat", "values", "i")

    def __init__(self, tensor: str, flat: np.ndarray, values: np.ndarray) -> None:
        self.tensor, self.flat, self.values, self.i = tensor, flat, values, 0

    def describe(self, shape: tuple[int, ...]) -> str:
        i = self.i
        return Perturbation(self.tensor, self.flat[i:i + 1], self.values[i:i + 1]).describe(shape)
