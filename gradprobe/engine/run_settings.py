"""The settings a check runs with once the code's type is known: the threshold resolved for
the type the check judges in, and the notes that say how."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..common.roundoff import is_narrow, unit_roundoff
from ..settings.options import CheckOptions, default_threshold
from .numeric_side import Numerics
from .promote import agreement


def resolved_settings(options: CheckOptions, numerics: Numerics) -> tuple[CheckOptions, list[str]]:
    """``options`` with the threshold resolved for the type the check judges in, and the
    notes that say so."""
    compute_dtype = numerics.code_dtype
    if numerics.analytic:  # the wider run's threshold (float64's, or float32's for 16-bit code)
        threshold = options.threshold or default_threshold(numerics.dtype)
        return replace(options, threshold=threshold), [_promoted_note(compute_dtype, numerics.why, threshold,
                                                                      numerics.dtype)]
    threshold = options.threshold or default_threshold(compute_dtype)
    if numerics.reference_only:
        return replace(options, threshold=threshold), [_reference_note(compute_dtype, numerics.why, threshold,
                                                                       numerics.dtype)]
    notes = [_threshold_note(compute_dtype, numerics.why)] if is_narrow(compute_dtype) else []
    return replace(options, threshold=threshold), notes


def _threshold_note(dtype: np.dtype, why: str) -> str:
    u = unit_roundoff(dtype)
    return (
        f"forward computes in {dtype}{why}: its unit roundoff is {u:.1e}, so central differences "
        f"are good to about {u ** (2 / 3):.0e} relative at best, and the default threshold for "
        f"it is {default_threshold(dtype):.2g} (2 sqrt(u))"
    )


def _promoted_note(dtype: np.dtype, why: str, threshold: float, wide: np.dtype) -> str:
    return (
        f"forward computes in {dtype}{why}; forward and backward also run in {wide}, so "
        f"backward's {wide} gradient was checked against {wide} numeric derivatives at the "
        f"{dtype} values within {threshold:g}, and its {dtype} gradient against that {wide} "
        f"gradient within {agreement(dtype):.2g} ({dtype} rounding) or within what its rounding "
        f"is measured to vary by"
    )


def _reference_note(dtype: np.dtype, why: str, threshold: float, wide: np.dtype) -> str:
    return (
        f"forward computes in {dtype}{why} and also runs in {wide}, but backward returns its "
        f"{dtype} gradient whatever it is given: that gradient was checked against {wide} "
        f"numeric derivatives of forward at the {dtype} values within {threshold:.2g} ({dtype} "
        f"rounding) or within what its rounding is measured to vary by"
    )
