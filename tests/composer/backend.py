"""Two array namespaces the ops are written against: numpy arrays and mpmath object arrays.

The ops in :mod:`composer.ops` call only the functions below (plus ``+ - * @``, comparisons and
``np.sum``, which numpy applies to object arrays element by element), so the same forward code
runs in float32/float64 numpy and in mpmath at 40 significant digits. Constants are Python floats,
which keep float32 arrays float32 and convert exactly to mpmath numbers. The mpmath side is
the independent reference: its derivatives come from ``mpmath.diff``, never from our VJPs.
"""

from __future__ import annotations

import mpmath
import numpy as np


class NumpyBackend:
    """numpy, keeping the dtype of the arrays it is given (float32 stays float32)."""

    name = "numpy"

    tanh = staticmethod(np.tanh)
    exp = staticmethod(np.exp)
    log = staticmethod(np.log)
    abs = staticmethod(np.abs)
    maximum = staticmethod(np.maximum)
    minimum = staticmethod(np.minimum)

    @staticmethod
    def softplus(a):
        return np.logaddexp(np.zeros((), dtype=np.result_type(a)), a)

    @staticmethod
    def amax(a, axis):
        return np.max(a, axis=axis)


def _elementwise(fn):
    vec = np.vectorize(fn, otypes=[object])

    def apply(a):
        return vec(np.asarray(a, dtype=object))

    return apply


class MpmathBackend:
    """mpmath numbers in object arrays; every function acts elementwise."""

    name = "mpmath"

    tanh = staticmethod(_elementwise(mpmath.tanh))
    exp = staticmethod(_elementwise(mpmath.exp))
    log = staticmethod(_elementwise(mpmath.log))
    softplus = staticmethod(_elementwise(lambda v: mpmath.log(1 + mpmath.exp(v))))
    abs = staticmethod(_elementwise(abs))

    @staticmethod
    def maximum(a, b):
        return np.maximum(np.asarray(a, dtype=object), b)

    @staticmethod
    def minimum(a, b):
        return np.minimum(np.asarray(a, dtype=object), b)

    @staticmethod
    def amax(a, axis):
        return np.max(np.asarray(a, dtype=object), axis=axis)


def to_mp(array) -> np.ndarray:
    """An object array of exact mpmath copies of a float array's values."""
    a = np.asarray(array)
    out = np.empty(a.shape, dtype=object)
    for idx in np.ndindex(a.shape):
        out[idx] = mpmath.mpf(float(a[idx]))
    return out


NUMPY = NumpyBackend()
MPMATH = MpmathBackend()
