"""Checking narrow code (float32, float16, ...) with float64 numerics, when it accepts float64.

The numeric side of a narrow check is limited by the type's rounding (central differences
reach about u**(2/3) at best, u its unit roundoff, and sums with cancellation lose far more).
When forward and backward, given the same values as float64 arrays, compute in float64, the
check runs on that float64 run: numeric derivatives in float64 at the narrow values, against
the float64 gradient of the same backward, at the float64 threshold. A bug in the backward's
formulas is in both runs and fails at that threshold. The narrow gradient the user's code
really returns must then agree with its float64 run to the narrow type's own threshold
(:func:`.roundoff.default_threshold`) or to what its rounding is measured to vary by (the
caller's); a coordinate beyond both is checked on the narrow code itself (overflow,
underflow or a branch taken only in the narrow type).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import ProbeError
from ..common.heap import release_heap
from ..common.tensors import Workspace, aligned_copy, is_float, is_float_dtype
from .evaluate import LossFunction
from .evaluator import Evaluator
from .gradients import Gradients, validate
from .precision import narrower_compute_type
from .preflight import call_backward
from ..common.roundoff import default_threshold, is_narrow, unit_roundoff

# Narrow and float64 losses may differ by this share of |f| (narrow rounding in sums with
# cancellation reaches percents; beyond this the float64 run computes something else), or by
# the narrow loss's own rounding, measured (a sum of terms far larger than itself).
AGREEMENT = 0.1


@dataclass(frozen=True)
class Promoted:
    workspace: Workspace
    loss: LossFunction
    f0: float
    analytic: dict[str, np.ndarray]  # the float64 run's gradient per tensor, flat
    narrow: dict[str, np.ndarray]  # the narrow gradient per tensor, flat
    # 16-bit code whose backward returns its 16-bit gradient whatever it is given: only
    # forward has a float64 run (analytic and narrow are then empty), see reference_only
    reference_only: bool = False


def _narrow_names(ws: Workspace) -> list[str]:
    return [n for n in ws.names() if is_float(ws.owners[n]) and is_narrow(ws.owners[n].dtype)]


def promote(
    evaluator: Evaluator, backward: Callable[..., Any], ws: Workspace,
    grads: Gradients, f0: float, rounding: Callable[[], float] | None = None, *,
    code_dtype: Any = None,
) -> Promoted | None:
    """float64 numerics for a narrow target, or None when its code does not take float64.

    Costs four forward calls (counted by ``evaluator``: the run, and three that look for a
    narrower type inside, :func:`.precision.narrower_compute_type`) and one backward call;
    ``rounding`` (the narrow loss's rounding, measured) is called where the two losses differ
    by more than AGREEMENT of |f|: within it they are the same computation still.
    16-bit code (``code_dtype``) whose forward runs in float64 but whose backward returns
    its 16-bit gradient whatever it is given gets a Promoted that is ``reference_only``."""
    names = _narrow_names(ws)
    if not names:
        return None
    # The float64 copies are the new workspace's own (no second copy of them); its other
    # floating tensors are copies too, as a workspace's are (they are perturbed there).
    wide = ws.replacing({n: aligned_copy(ws.owners[n], np.float64) if n in names else aligned_copy(ws.owners[n])
                         for n in ws.names() if is_float(ws.owners[n])})
    grad_output = evaluator.loss.grad_output
    loss = LossFunction(evaluator.loss.forward, wide, grad_output)
    try:
        wide_evaluator = evaluator.sibling(loss)
        f64, dtype = wide_evaluator.base_with_type()
        if dtype != np.float64:
            return None
        if narrower_compute_type(wide_evaluator, wide, f64, dtype, source=ws) is not None:
            return None  # it casts to a narrower type inside: the float64 run is not float64
        apart = abs(f64 - f0) > AGREEMENT * max(abs(f0), abs(f64))
        # backward was seen not to write into its arrays (the narrow call): no scratch copies.
        release_heap()  # the looks' moved copies: their pages back before the float64 backward's
        # Called before any narrow forward call: a framework's upstream gradient takes the
        # type of the last forward's result (bfloat16 would round it).
        raw = call_backward(backward, wide, grad_output, scratch=False)
        if apart and (rounding is None or abs(f64 - f0) > rounding()):
            return None  # another computation, beyond the narrow loss's own rounding
        if not _all_float64(raw):
            # backward rounds to the narrow type itself: no float64 run of it to compare with;
            # 16-bit code's forward is still the reference (its own staircase of a loss
            # cannot tell a factor of 2 from rounding)
            if code_dtype is not None and reference_only(np.dtype(code_dtype)):
                return Promoted(wide, loss, f64, {}, {}, reference_only=True)
            return None
        grads64 = validate(raw, wide)
    except (ProbeError, Exception):  # float64 is outside what this code accepts
        return None
    analytic: dict[str, np.ndarray] = {}
    narrow: dict[str, np.ndarray] = {}
    for name, g in grads.values.items():
        g64 = grads64.values.get(name)
        if g64 is None or g64.shape != g.shape:
            return None
        analytic[name] = g64.reshape(-1)
        narrow[name] = g.reshape(-1)
    return Promoted(wide, loss, f64, analytic, narrow)


def reference_only(dtype: np.dtype) -> bool:
    """16-bit types (float16, bfloat16): judged against a float64 forward's numeric
    derivatives where backward has no float64 run (coarser than float16's unit roundoff)."""
    return unit_roundoff(dtype) >= unit_roundoff(np.float16)


def _all_float64(tree: Any) -> bool:
    if isinstance(tree, Mapping):
        return all(_all_float64(v) for v in tree.values())
    array = np.asarray(tree)
    return not is_float_dtype(array.dtype) or array.dtype == np.float64  # ml_dtypes' bfloat16 too


def agreement(dtype: np.dtype) -> float:
    """The share of a coordinate's scale by which a gradient computed in ``dtype`` may leave
    its float64 run: the type's own threshold."""
    return default_threshold(dtype)


def disagreeing(narrow: np.ndarray, wide: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Coordinates whose narrow gradient is further from its float64 run than ``allowed``."""
    return np.abs(narrow - wide) > allowed
