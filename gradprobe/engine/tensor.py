"""Checking one tensor: which coordinates, which numeric method, and the summary."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..diagnose import Evidence
from .compare import FAIL
from .coordinates import Problem, check_coordinates
from .summary import tensor_result

if TYPE_CHECKING:
    from ..report import TensorResult
    from .runner import Context


def check_tensor(ctx: "Context", name: str, grad: np.ndarray) -> tuple["TensorResult", Evidence]:
    """The tensor's result (without a hint) and the evidence hints are drawn from."""
    ws = ctx.workspace
    owner = ws.owners[name]
    flat = np.arange(owner.size, dtype=np.int64)
    values = owner.reshape(-1)
    problem = Problem(
        tensor=name,
        flat=flat,
        x=values[flat].copy(),
        analytic=grad.reshape(-1)[flat],
        f0=ctx.f0,
        compute_dtype=ctx.compute_dtype,
        threshold=ctx.threshold,
    )
    outcome = check_coordinates(ctx.evaluator, problem, ctx.options.method, ctx.options.recheck)
    evidence = Evidence(name, tuple(owner.shape), outcome.flat, outcome.analytic,
                        outcome.numeric, outcome.status == FAIL)
    return tensor_result(name, ws.layer(name), ws.kind(name), owner, outcome), evidence
