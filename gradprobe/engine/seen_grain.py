"""The resolution a float32 loss shows along a coordinate, for a failure read off a loss that
did not change at all (:mod:`.staircase`).

Such a failure stands only where a pair at a step the coarsest arithmetic inside must
resolve leaves the loss unchanged on both sides; :func:`.staircase.bfloat16_step` takes
bfloat16's unit of the whole loss as what a cast inside could hide. Where the loss is large
(an exp term of 1e4 beside a switched-off relu), that step reaches beyond the params' own
scale and the failure was undecided, though the code may well resolve the gradient.

But the loss along the coordinate itself shows how finely its arithmetic resolves it: at
POINTS moves on each side, evenly out to the params' own scale, any two losses that differ
do so by at least the spacing of the grid the loss is rounded to there (two values one
rounding apart differ by one spacing of it at most). The smallest positive difference among
them and the loss at the point is the grain seen; where it lies below bfloat16's unit of the
loss, no 16-bit rounding of the sum made it, and the same step rule holds with it in place of
that unit: at UNITS grains over |a| (and at least SPACINGS of bfloat16's spacings at the
param, for a cast of the param itself) a loss with slope a changes on one side at least,
whatever rounds inside. A loss that did not change anywhere shows no grain, and nothing
changes.
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe

POINTS = 8  # moves per side, evenly out to the params' scale


def seen_grain(probe: TensorProbe, flat: np.ndarray, reach: np.ndarray) -> np.ndarray:
    """Per coordinate ``flat[i]``: the smallest positive difference among the losses at POINTS
    moves on each side out to ``reach[i]`` and the loss at the point (inf where none differ)."""
    k = np.arange(1, POINTS + 1, dtype=np.float64) / POINTS
    where = np.repeat(flat, POINTS)
    p = probe.pairs(where, (reach[:, None] * k[None, :]).reshape(-1))
    values = np.concatenate([p.f_plus.reshape(flat.size, POINTS), p.f_minus.reshape(flat.size, POINTS),
                             np.full((flat.size, 1), probe.f0)], axis=1)
    grain = np.full(flat.size, np.inf)
    for i, row in enumerate(values):
        seen = np.unique(row[np.isfinite(row)])
        if seen.size > 1:
            grain[i] = float(np.diff(seen).min())
    return grain


__all__ = ["POINTS", "seen_grain"]
