"""How much the loss rounds when a whole tensor moves at once.

The target's loss scale (:mod:`.noise`) is measured by moving a few params of each tensor.
A direction moves every element of its tensor: every term the forward sums then rounds
afresh, and a sum of many large signed terms (a squared error with signed weights over tens
of thousands of elements) rounds far more than the few moved terms showed. The direction's
ladder then reads that rounding as a quotient that does not settle, and its bound is lost
(or, where the rows happen to settle, is too tight).

Here every element of the tensor moves by ULPS units in its last place, each with a random
sign, k = 1..SPAN times: the moves are exactly k times the first (within a binade), so the
loss changes linearly in k whatever the gradient, right or wrong, and the second differences
of the loss values keep only how its rounding varies from point to point (as
:func:`.noise.measured_rounding` takes it). SPAN calls per tensor, no array of the tensor's
size beyond the one moved copy that :meth:`.probe.TensorProbe.along` already keeps.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any

import numpy as np

from ..common.errors import BadOutputError, UserCodeError
from .noise import SPAN, SPREAD_MARGIN, ULPS
from .probe import TensorProbe

# The whole move's rounding replaces the target's model only where it is clearly above it:
# SPREAD_MARGIN times the largest of three second differences reads one value's spread s as
# about 5 s, and a loss rounded to a coarse grid (float32, cast) moves by whole grid units, so
# a figure within this factor of the model is what the model already says.
CLEARLY_ABOVE = 4.0


class UlpMoves:
    """ULPS units in the last place of each element of ``x`` (on the grid of ``dtype`` where
    coarser), with random signs: drawn again, bit for bit, a block at a time where read."""

    def __init__(self, x: np.ndarray, dtype: np.dtype, state: Mapping[str, Any], kind: type) -> None:
        self._x, self._dtype, self._state, self._kind = x, dtype, state, kind

    @property
    def size(self) -> int:
        return int(self._x.size)

    def blocks(self, step: int) -> Iterator[np.ndarray]:
        bits = self._kind()
        bits.state = self._state
        rng = np.random.Generator(bits)
        for lo in range(0, self.size, step):
            x = self._x[lo:lo + step]
            spacing = np.spacing(np.abs(x.astype(self._dtype))).astype(np.float64)
            spacing = np.maximum(spacing, np.spacing(np.abs(x)).astype(np.float64))
            yield ULPS * spacing * rng.choice([-1.0, 1.0], size=x.size)


def moved_loss_scale(probe: TensorProbe, rng: np.random.Generator) -> float:
    """A loss scale L such that the probe's rounding model (rounding_units * eps * L) covers
    the rounding seen when every element of the tensor moves, where that is CLEARLY_ABOVE the
    probe's own loss scale; else 0.0 (also where forward fails at the moved points, or for a
    tensor with no elements)."""
    if probe.size == 0:
        return 0.0
    moves = UlpMoves(probe.x, probe.compute_dtype, rng.bit_generator.state, type(rng.bit_generator))
    try:
        values, _ = probe.along(slice(0, probe.size), moves, np.arange(1.0, SPAN + 1.0))
    except (UserCodeError, BadOutputError):
        return 0.0
    values = np.concatenate([[probe.f0], values])
    if not np.all(np.isfinite(values)):
        return 0.0
    seen = SPREAD_MARGIN * float(np.abs(np.diff(values, n=2)).max())
    scale = seen / (probe.rounding_units * probe.eps)
    return scale if scale > CLEARLY_ABOVE * probe.loss_scale else 0.0
