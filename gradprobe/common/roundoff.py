"""One model of a floating type's rounding: its unit roundoff u = eps / 2.

Every number gradprobe derives for a type (its default threshold, how far a narrow gradient
may leave its wider run, the first step of central differences, the rounding noise of a loss)
comes from u, read from the type's ``finfo`` (numpy's describes ml_dtypes' bfloat16 too), and
from the rounding measured on the target, so a new type needs no entry of its own.

The default threshold of code judged on its own arithmetic in a type narrower than float64
is NARROW_UNITS * sqrt(u), half the digits the type carries: a loss that rounds at a few
units of u gives central differences good to about u**(2/3) at the best step, so sqrt(u)
leaves a factor u**(-1/6) (16 for float32, 3.6 for float16) for conditioning and for the
backward's own rounding, while an error of 0.5% (float32) or 5% (float16) stays above it.
float64 keeps 1e-6 (common practice: room for conditioning far above its u**(2/3) ~ 4e-11).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

FLOAT64_THRESHOLD = 1e-6
NARROW_UNITS = 2.0  # the narrow threshold is this many square roots of u


# Rounding noise of one loss value, in units of the type's eps, assumed before any is
# measured: float64 code 8 (a chain of operations each rounding once, common practice; the
# calibration tests against mpmath hold it); narrow code 1 (the result's own rounding), the
# rest measured on the target (noise.measured_rounding), since a narrow loss's rounding
# ranges from one unit to thousands and assuming more hides the errors its arithmetic resolves.
FLOAT64_ROUNDING_UNITS = 8.0
NARROW_ROUNDING_UNITS = 1.0


def unit_roundoff(dtype: Any) -> float:
    """u = eps / 2: the largest relative error of rounding one real number to ``dtype``
    (numpy's finfo describes ml_dtypes' types too, bfloat16 included)."""
    return float(np.finfo(dtype).eps) / 2.0


def is_narrow(dtype: Any) -> bool:
    """The type rounds more coarsely than float64."""
    return unit_roundoff(dtype) > unit_roundoff(np.float64)


def rounding_units(dtype: Any) -> float:
    """The loss's assumed rounding noise for code computing in ``dtype``, in units of eps."""
    return NARROW_ROUNDING_UNITS if is_narrow(dtype) else FLOAT64_ROUNDING_UNITS


def default_threshold(dtype: Any) -> float:
    """The relative-error threshold of code whose numeric side computes in ``dtype``."""
    if not is_narrow(dtype):
        return FLOAT64_THRESHOLD
    derived = NARROW_UNITS * math.sqrt(unit_roundoff(dtype))
    return max(FLOAT64_THRESHOLD, float(f"{derived:.2g}"))  # two digits, as the docs say it
