"""Finite-difference steps scaled to each coordinate and to the floating type.

The truncation error of a central difference is about h**2 |f'''| / 6 and its rounding
error about eps |f| / h, so the best step is h ~ eps**(1/3) (Nocedal & Wright, Numerical
Optimization, 2nd ed., section 8.1). The step is scaled by max(1, |x|), rounded to a power
of two, and the step actually used is read back as (x + h) - x so that the divisor is the
true distance between the two points the forward saw.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def relative_step(compute_dtype: np.dtype) -> float:
    """eps**(1/3) of the type the forward computes in (6.06e-6 for float64)."""
    return float(np.finfo(compute_dtype).eps) ** (1.0 / 3.0)


@dataclass(frozen=True)
class Steps:
    """Perturbed values and the exact distances from the base point, per coordinate."""

    plus: np.ndarray  # x + h, in the tensor's own dtype
    minus: np.ndarray  # x - h
    h_plus: np.ndarray  # float64 distance actually stepped up
    h_minus: np.ndarray  # float64 distance actually stepped down


def as_seen(values: np.ndarray, compute_dtype: np.dtype) -> np.ndarray:
    """The values as the forward sees them: rounded to the compute type when it is narrower."""
    if np.finfo(compute_dtype).eps > np.finfo(values.dtype).eps:
        values = values.astype(compute_dtype)
    return values.astype(np.float64)


def make_steps(
    x: np.ndarray, compute_dtype: np.dtype, scale: float = 1.0, power_of_two: bool = True
) -> Steps:
    """Steps for the 1-D float array ``x`` (values of the coordinates to perturb).

    ``power_of_two=False`` keeps the nominal step, for tableaux whose steps must shrink by
    a fixed ratio.
    """
    x = np.asarray(x)
    raw = relative_step(compute_dtype) * scale * np.maximum(1.0, np.abs(x.astype(np.float64)))
    h = np.exp2(np.round(np.log2(raw))) if power_of_two else raw
    for _ in range(4):  # a step below the resolution of x reads back as 0: widen it
        plus = (x + h).astype(x.dtype)
        minus = (x - h).astype(x.dtype)
        base = as_seen(x, compute_dtype)
        h_plus = as_seen(plus, compute_dtype) - base
        h_minus = base - as_seen(minus, compute_dtype)
        flat = (h_plus <= 0) | (h_minus <= 0)
        if not flat.any():
            break
        h = np.where(flat, h * 16, h)
    return Steps(plus, minus, h_plus, h_minus)
