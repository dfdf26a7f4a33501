"""Forward's result read as one loss value, and the checks on what forward returned."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..common.errors import BadOutputError
from ..common.tensors import is_numeric_dtype


def is_read_only_write(exc: BaseException) -> bool:
    return isinstance(exc, ValueError) and "read-only" in str(exc)


def output_to_loss(out: Any, grad_output: np.ndarray | None, where: str) -> float | complex:
    """The scalar loss of one forward result; BadOutputError for anything unusable."""
    if grad_output is None and type(out) in (float, np.float64, np.float32) and math.isfinite(out):
        return float(out)  # the common case, kept cheap
    if isinstance(out, (tuple, list, str, bytes, dict)) or out is None:
        raise BadOutputError(
            f"forward returned a {type(out).__name__}{where}, not a number or an array", value=out
        )
    try:
        array = np.asarray(out)
    except Exception as exc:
        raise BadOutputError(f"forward returned {type(out).__name__}{where}", value=out) from exc
    if not is_numeric_dtype(array.dtype):
        raise BadOutputError(
            f"forward returned an array of dtype {array.dtype}{where}, not numbers", value=out
        )
    finite = np.isfinite(array)
    if not finite.all():
        bad = int(array.size - finite.sum())
        raise BadOutputError(
            f"forward returned {bad} non-finite value{'s' if bad > 1 else ''}{where}", value=out
        )
    if grad_output is None:
        if array.size != 1:
            raise BadOutputError(
                f"forward returned an array of shape {array.shape}{where} where a scalar was "
                "returned before", value=out,
            )
        value = array.reshape(())[()]
        return complex(value) if np.iscomplexobj(array) else float(np.float64(value))
    if array.shape != grad_output.shape:
        raise BadOutputError(
            f"forward returned shape {array.shape}{where} where it returned "
            f"{grad_output.shape} before", value=out,
        )
    if np.iscomplexobj(array):
        return complex(np.sum(grad_output * array))
    return float(np.sum(grad_output * array.astype(np.float64, copy=False)))


def overflowed(out: Any) -> bool:
    """forward returned numbers, some of them not finite."""
    if isinstance(out, (tuple, list, str, bytes, dict)) or out is None:
        return False
    try:
        array = np.asarray(out)
    except Exception:
        return False
    return bool(is_numeric_dtype(array.dtype) and not np.isfinite(array).all())
