"""The numeric side of a target at one set of values: the type the user's code computes in
(its result's, its params' where coarser, or a hidden float32 found by moving them), and
for narrow code that accepts float64 its float64 run, whose workspace, loss and gradients
the numeric derivatives then use (:mod:`.promote`). :mod:`.point` prepares a point with it.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.roundoff import is_narrow
from ..common.tensors import Workspace, is_float
from .evaluate import LossFunction
from .evaluator import Evaluator
from .gradients import Gradients, widened
from .noise import measured_rounding
from .precision import narrower_compute_type
from .preflight import ForwardInfo
from .promote import promote
from .sampling import tensor_rng


@dataclass(frozen=True)
class Numerics:
    """Where the numeric side works: the workspace perturbed, its base loss and type."""

    workspace: Workspace
    f0: float
    dtype: np.dtype  # the type the numeric side computes in
    code_dtype: np.dtype  # the type the user's code computes in
    analytic: dict[str, np.ndarray]  # the float64 run's gradients, for narrow code promoted
    narrow: dict[str, np.ndarray]  # the narrow gradients those replace
    why: str  # how the code's type was found, for the note
    terms: float = 0.0  # the size of the terms the loss is summed from (ForwardInfo.terms)
    # 16-bit code whose backward stays 16-bit: its gradient (widened) against float64
    # numeric derivatives of its forward's float64 run, at the 16-bit type's threshold
    reference_only: bool = False


def _compute_type(out_dtype: np.dtype, ws: Workspace) -> tuple[np.dtype, str]:
    """The type forward computes in: its result's, or its params' when those are coarser
    (float32 params whose loss is returned as a Python float still carry float32 noise)."""
    kinds = [ws.owners[n].dtype for n in ws.param_names if is_float(ws.owners[n])]
    coarsest = max(kinds, key=lambda d: np.finfo(d).eps)
    if np.finfo(coarsest).eps > np.finfo(out_dtype).eps:
        return np.dtype(coarsest), f" (its params are {coarsest}, though it returns {out_dtype})"
    return np.dtype(out_dtype), ""


def code_type(ws: Workspace, evaluator: Evaluator, info: ForwardInfo) -> tuple[np.dtype, str]:
    """The code's compute type (3 calls to look for hidden float32) and how it was found."""
    dtype, why = _compute_type(info.out_dtype, ws)
    hidden = narrower_compute_type(evaluator, ws, info.f0, dtype)
    if hidden is not None:
        dtype, why = hidden.dtype, hidden.evidence
    return dtype, why


def numeric_side(backward: Callable[..., Any], ws: Workspace, evaluator: Evaluator,
                 info: ForwardInfo, grads: Gradients, dtype: np.dtype, why: str, seed: int,
                 ) -> tuple[Numerics, LossFunction]:
    """float64 numerics for narrow code that accepts float64 (1 forward and 1 backward
    call), else the code's own; with the loss the numeric side evaluates."""
    if is_narrow(dtype):
        def rounding() -> float:  # the narrow loss's, where it leaves the float64 loss
            return measured_rounding(evaluator, ws, list(grads.values), info.f0,
                                     tensor_rng(seed, "", "narrow agreement"), dtype)
        promoted = promote(evaluator, backward, ws, grads, info.f0, rounding, code_dtype=dtype)
        if promoted is not None and promoted.reference_only:
            widened(grads)
            return Numerics(promoted.workspace, promoted.f0, promoted.dtype, dtype, {}, {}, why,
                            info.terms, reference_only=True), promoted.loss
        if promoted is not None:  # the narrow gradients stay in their own type
            return Numerics(promoted.workspace, promoted.f0, promoted.dtype, dtype,
                            promoted.analytic, promoted.narrow, why, info.terms), promoted.loss
    widened(grads)
    return Numerics(ws, info.f0, dtype, dtype, {}, {}, why, info.terms), evaluator.loss


__all__ = ["Numerics", "code_type", "numeric_side"]
