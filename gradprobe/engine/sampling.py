"""Choosing at most N coordinates of a tensor: stratified over every axis, plus the largest.

For each axis the sample runs through a random permutation of that axis's positions over
and over, so every slice along every axis (every row and every column of a matrix) is
represented as soon as N reaches the axis length; the axes are paired at random. An eighth
of the budget goes to the coordinates with the largest analytic gradient, where scaling
mistakes show first. Everything is drawn from a generator seeded by (seed, tensor name).
"""

from __future__ import annotations

import zlib

import numpy as np

TOP_SHARE = 8  # 1/8 of the sample: the largest analytic gradients


def tensor_rng(seed: int, name: str, purpose: str) -> np.random.Generator:
    """A generator for one tensor and purpose, independent of the order tensors are checked in."""
    return np.random.default_rng([seed, zlib.crc32(name.encode()), zlib.crc32(purpose.encode())])


def stratified(shape: tuple[int, ...], n: int, rng: np.random.Generator, analytic: np.ndarray) -> np.ndarray:
    """Sorted flat indices of at most ``n`` coordinates of a tensor of ``shape``."""
    size = int(np.prod(shape, dtype=np.int64))
    if n >= size:
        return np.arange(size, dtype=np.int64)
    if n <= 0:
        return np.empty(0, dtype=np.int64)
    dims = shape if shape else (1,)
    strata = max(n - n // TOP_SHARE, min(n, max(dims)))  # coverage first, then the largest
    top = n - strata
    chosen = set(np.argsort(-np.abs(analytic), kind="stable")[:top].tolist()) if top else set()
    m = strata
    axes = [np.resize(rng.permutation(length), m) for length in dims]
    for column in axes[1:]:
        rng.shuffle(column)
    flat = np.ravel_multi_index(tuple(axes), dims) if m else np.empty(0, dtype=np.int64)
    for k in flat.tolist():
        chosen.add(int(k))
    if len(chosen) < n:  # pairings that collided: fill with other coordinates at random
        rest = np.setdiff1d(np.arange(size), np.fromiter(chosen, dtype=np.int64))
        chosen.update(rng.choice(rest, size=n - len(chosen), replace=False).tolist())
    return np.sort(np.fromiter(chosen, dtype=np.int64))


SIGN_CHUNK = 1 << 16  # values drawn at a time by random_negative


def random_negative(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Which values of ``shape`` take the sign -1 in ``rng.choice([-1.0, 1.0], size=shape)``,
    the same draws (one uniform index per value, in order), a chunk at a time: a bool mask,
    never the full-size int64 index and float64 copy that call builds at once."""
    out = np.empty(shape, dtype=bool)
    flat = out.reshape(-1)
    for start in range(0, flat.size, SIGN_CHUNK):
        stop = min(start + SIGN_CHUNK, flat.size)
        flat[start:stop] = rng.integers(0, 2, size=stop - start) == 0
    return out


def random_signs(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """``rng.choice([-1.0, 1.0], size=shape)`` as float64, drawn a chunk at a time."""
    out = np.ones(shape, dtype=np.float64)
    np.negative(out, out=out, where=random_negative(rng, shape))
    return out
