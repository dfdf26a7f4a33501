"""The complex step (``--method complex``): one call a coordinate, nothing subtracted."""

from __future__ import annotations

import numpy as np

from ..common.errors import BadOutputError, ComplexStepError, UserCodeError
from .ladder import Estimate
from .probe import TensorProbe

COMPLEX_STEP = 1e-20  # relative; any tiny step works since nothing is subtracted
NOT_COMPLEX_SAFE = (
    "forward is not complex-safe for {tensor} (the complex step and central differences "
    "disagree: np.abs, np.var, conjugation or np.real in its path?), so central differences "
    "were used for it"
)


def complex_step(probe: TensorProbe, flat: np.ndarray) -> Estimate:
    """Im f(x + ih) / h (Squire & Trapp, SIAM Review 40(1), 1998): one call a coordinate."""
    h = COMPLEX_STEP * np.maximum(1.0, np.abs(probe.x[flat].astype(np.float64)))
    try:
        values = probe.complex_losses(flat, h)
    except (UserCodeError, BadOutputError) as exc:
        raise ComplexStepError(
            f"forward cannot take complex inputs, so --method complex cannot be used "
            f"({exc.message})"
        ) from exc
    if not np.any(values.imag) and np.any(probe.a[flat]):
        raise ComplexStepError(
            "forward drops the imaginary part of complex inputs, so --method complex cannot "
            "be used (np.real, float(), astype(float) or abs() in forward?)"
        )
    numeric = values.imag / h
    return Estimate(numeric, 8 * np.finfo(np.float64).eps * np.maximum(np.abs(numeric), np.abs(probe.a[flat])))
