"""Arrays read as float64: a narrow gradient kept in its own type (:class:`Widened`), values
as a narrower compute type sees them (:func:`as_seen`), and a root mean square that makes no
float64 copy (:func:`root_mean_square`)."""

from __future__ import annotations

from typing import Any

import numpy as np


def root_mean_square(x: np.ndarray | Widened) -> float:
    """The root mean square of ``x`` without a float64 copy of it (a dot product of float64
    values; narrower ones are converted a chunk at a time)."""
    if x.size == 0:
        return 0.0
    if isinstance(x, np.ndarray) and x.dtype == np.float64:
        with np.errstate(over="ignore"):
            total = float(np.dot(x, x))
        if total == np.inf:  # squares beyond float64 (gradients above ~1e154): scale first
            top = float(np.max(np.abs(x)))
            return top if not np.isfinite(top) else top * float(np.sqrt(np.dot(x / top, x / top) / x.size))
        return float(np.sqrt(total / x.size))
    total = sum(float(np.dot(c, c)) for c in (x[k:k + 65536].astype(np.float64)
                                               for k in range(0, x.size, 65536)))
    return float(np.sqrt(total / x.size))


class Widened:
    """A narrow array (float32, float16, bfloat16) read as float64 wherever it is indexed:
    the narrow gradient of code checked on its float64 run, kept in its own type (half the
    memory of a float64 copy, or less) and exact in float64."""

    def __init__(self, values: np.ndarray) -> None:
        self.values = values

    @property
    def dtype(self) -> np.dtype:
        return self.values.dtype

    @property
    def size(self) -> int:
        return int(self.values.size)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.values.shape)

    def __len__(self) -> int:
        return len(self.values)

    def __getitem__(self, key: Any) -> np.ndarray:
        return np.asarray(self.values[key], dtype=np.float64)


def as_seen(values: np.ndarray, compute_dtype: np.dtype) -> np.ndarray:
    """The values as the forward sees them: rounded to the compute type when it is narrower."""
    if np.finfo(compute_dtype).eps > np.finfo(values.dtype).eps:
        values = values.astype(compute_dtype)
    return values.astype(np.float64, copy=False)
