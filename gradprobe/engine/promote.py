"""Checking float32 code with float64 numerics, when its forward accepts float64.

The numeric side of a float32 check is limited by float32 rounding (central differences
reach about eps32**(2/3) ~ 2e-5 at best), so a flat 1e-2 threshold lets sub-percent bugs
through. When forward, given the same values as float64 arrays, computes in float64 and
agrees with its float32 result to float32 precision, the numeric derivatives are taken in
float64 at the float32 values. The analytic side keeps its own float32 rounding: backward
is called once more on the float64 arrays, and the difference of the two gradients is that
rounding, measured per coordinate. A coordinate then fails only when its discrepancy exceeds
both the threshold and a few times that measured noise.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..errors import ProbeError
from ..tensors import Workspace, is_float
from .evaluate import Evaluator, LossFunction
from .gradients import Gradients, validate
from .preflight import call_backward

# float32 code, numerics in float64: a threshold that a 0.5% error exceeds, with the
# analytic side's own rounding allowed for per coordinate (common practice for the size of
# float32 rounding in sums: a few units of eps32 times the condition of the sum).
PROMOTED_THRESHOLD = 1e-3
AGREEMENT_UNITS = 1024.0  # float32 and float64 losses may differ by this many eps32 |f|


@dataclass(frozen=True)
class Promoted:
    workspace: Workspace
    loss: LossFunction
    f0: float
    analytic_noise: dict[str, np.ndarray]  # |g32 - g64| per tensor, float64


def _narrow_names(ws: Workspace) -> list[str]:
    return [n for n in ws.names() if is_float(ws.owners[n]) and ws.owners[n].dtype == np.float32]


def promote(
    evaluator: Evaluator, backward: Callable[..., Any], ws: Workspace,
    grads: Gradients, f0: float,
) -> Promoted | None:
    """float64 numerics for a float32 target, or None when its code does not take float64.

    Costs one forward call (counted by ``evaluator``) and one backward call."""
    names = _narrow_names(ws)
    if not names:
        return None
    params, inputs = ws.trees_with({n: ws.owners[n].astype(np.float64) for n in names})
    wide = Workspace(params, inputs)
    grad_output = evaluator.loss.grad_output
    loss = LossFunction(evaluator.loss.forward, wide, grad_output)
    try:
        evaluator.count += 1
        f64, dtype = loss.base_with_type()
        if dtype != np.float64:
            return None
        eps32 = float(np.finfo(np.float32).eps)
        if abs(f64 - f0) > AGREEMENT_UNITS * eps32 * max(abs(f0), abs(f64)):
            return None
        grads64 = validate(call_backward(backward, wide, grad_output), wide)
    except (ProbeError, Exception):  # float64 is outside what this code accepts
        return None
    noise: dict[str, np.ndarray] = {}
    for name, g in grads.values.items():
        g64 = grads64.values.get(name)
        if g64 is None or g64.shape != g.shape:
            return None
        noise[name] = np.abs(g - g64).reshape(-1)
    return Promoted(wide, loss, f64, noise)
