"""Random unit directions over a tensor, and the analytic gradient's projection on one.

A direction over up to LAZY_DIRECTION elements is one array; a larger one is kept as the
generator states it was drawn from (:class:`Direction`) and drawn again, bit for bit, a block
at a time where read, so no array of the tensor's size is held beside a moved copy.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from typing import Any, Union

import numpy as np


LAZY_DIRECTION = 1 << 18  # directions over more elements are drawn again when read, not kept
DRAW_BLOCK = 1 << 16  # elements drawn at a time; the generator's state is kept at each block


class Direction:
    """A unit direction over ``[lo, hi)`` of a large tensor, kept as the generator states it
    was drawn from and its norm, not as an array: its values are drawn again, bit for bit
    the same, where they are read (:meth:`blocks` a block at a time; ``np.asarray`` or an
    index array the whole range at once). While a moved copy of the tensor is alive, the
    direction then holds no array of the tensor's size."""

    def __init__(self, states: Sequence[Mapping[str, Any]], kind: type, norm: float, lo: int,
                 hi: int, holes: np.ndarray | None = None) -> None:
        self._states, self._kind, self._norm, self.lo, self.hi = states, kind, norm, lo, hi
        self._holes = holes  # sorted flat indices of the whole draw that read as 0, or None

    @property
    def size(self) -> int:
        return self.hi - self.lo

    @property
    def norm(self) -> float:
        """The norm of the whole direction's draws, which its values are divided by."""
        return self._norm

    def blocks(self, step: int) -> Iterator[np.ndarray]:
        """The values a block of ``step`` at a time, in order."""
        first = self.lo // DRAW_BLOCK
        bits = self._kind()
        bits.state = self._states[first]
        rng = np.random.Generator(bits)
        skip = self.lo - first * DRAW_BLOCK
        if skip:
            rng.standard_normal(skip)
        for lo in range(self.lo, self.hi, step):
            g = rng.standard_normal(min(step, self.hi - lo))
            g /= self._norm
            if self._holes is not None:
                at = self._holes[np.searchsorted(self._holes, lo):np.searchsorted(self._holes, lo + g.size)]
                g[at - lo] = 0.0
            yield g

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        out = np.empty(self.size)
        for k, block in zip(range(0, self.size, DRAW_BLOCK), self.blocks(DRAW_BLOCK)):
            out[k:k + block.size] = block
        return out if dtype is None else out.astype(dtype, copy=False)

    def __getitem__(self, index):
        if isinstance(index, slice) and index.step in (None, 1):
            lo, hi, _ = index.indices(self.size)
            return Direction(self._states, self._kind, self._norm, self.lo + lo, self.lo + max(hi, lo),
                             self._holes)
        return np.asarray(self)[index]

    def scaled(self, factor: float, holes: np.ndarray | None = None) -> Direction:
        """The same draws times ``factor`` (with ``holes``, flat indices of the whole draw,
        read as 0 besides any already)."""
        if holes is not None and self._holes is not None:
            holes = np.union1d(self._holes, holes)
        return Direction(self._states, self._kind, self._norm / factor, self.lo, self.hi,
                         self._holes if holes is None else holes)


Vector = Union[np.ndarray, Direction]  # a direction as an array, or drawn again where read


def _square_sum(u: Vector) -> float:
    if isinstance(u, Direction):
        return float(sum(float(b @ b) for b in u.blocks(DRAW_BLOCK)))
    return float(u @ u)


def unit_part(u: Vector, lo: int, hi: int) -> Vector:
    """``u[lo:hi]`` scaled to unit length (a part that is all 0 is returned as it is)."""
    part = u[lo:hi]
    norm = _square_sum(part) ** 0.5
    if norm == 0.0:
        return part
    return part.scaled(1.0 / norm) if isinstance(part, Direction) else part / norm


def without(u: Vector, holes: np.ndarray) -> Vector:
    """The whole direction ``u`` with its elements at the flat indices ``holes`` set to 0,
    scaled back to unit length (a direction drawn again where read stays so)."""
    holes = np.unique(np.asarray(holes, dtype=np.int64))
    if isinstance(u, Direction):
        assert u.lo == 0, "holes are flat indices of the whole draw"
        zeroed = u.scaled(1.0, holes)
        norm = _square_sum(zeroed) ** 0.5
        return zeroed if norm == 0.0 else zeroed.scaled(1.0 / norm)
    v = np.array(u, dtype=np.float64)
    v[holes] = 0.0
    norm = float(np.linalg.norm(v))
    return v if norm == 0.0 else v / norm


def unit_direction(size: int, rng: np.random.Generator) -> Vector:
    """A unit vector of length ``size``, uniformly distributed on the sphere (a large one as a
    :class:`Direction`, drawn again where read)."""
    if size <= LAZY_DIRECTION:
        g = rng.standard_normal(size)
        g /= np.linalg.norm(g)  # in place: a large tensor's direction is one array
        return g
    block = np.empty(DRAW_BLOCK)  # the draws a block at a time: no array of the tensor's size
    states = []
    squares = 0.0
    for lo in range(0, size, DRAW_BLOCK):
        states.append(rng.bit_generator.state)
        g = block[:min(DRAW_BLOCK, size - lo)]
        rng.standard_normal(out=g)  # the same draws as one call
        squares += float(g @ g)
    return Direction(states, type(rng.bit_generator), float(np.sqrt(squares)), 0, size)


def dot(a: np.ndarray, u: Vector) -> float:
    """``a . u``; summed a block of DRAW_BLOCK at a time for a direction drawn again where
    read (no array of the tensor's size) and for any over more than LAZY_DIRECTION elements
    (the same sum, bit for bit, whichever form the direction is in)."""
    if not isinstance(u, Direction) and u.size <= LAZY_DIRECTION:
        return float(a @ u)
    blocks = (u.blocks(DRAW_BLOCK) if isinstance(u, Direction)
              else (u[k:k + DRAW_BLOCK] for k in range(0, u.size, DRAW_BLOCK)))
    return float(sum(float(a[k:k + b.size] @ b) for k, b in zip(range(0, u.size, DRAW_BLOCK), blocks)))


__all__ = ["DRAW_BLOCK", "LAZY_DIRECTION", "Direction", "Vector", "dot", "unit_direction", "unit_part",
           "without"]
