"""Noticing a forward that computes in float32 although it is handed float64 arrays.

Every float64 param is first rounded to float32 (a point float32 code sees exactly) and then
moved by 2**-36 of its size, far below float32's resolution (2**-24) but well above
float64's (2**-53). Float64 code sees the move; float32 code gives a bitwise identical loss.
A third call with a move of 2**-12 confirms that the loss depends on the params at all, and
how large the float64 change would have been.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..common.errors import BadOutputError, UserCodeError
from ..common.tensors import Workspace
from .evaluate import Evaluator, Perturbation

SMALL = 2.0**-36
LARGE = 2.0**-12


@dataclass(frozen=True)
class HiddenType:
    dtype: np.dtype
    evidence: str


def _moved(ws: Workspace, names: list[str], relative: float) -> list[Perturbation]:
    out = []
    for name in names:
        owner = ws.owners[name]
        moved = owner.reshape(-1).astype(np.float32).astype(np.float64)
        moved *= 1.0 + relative  # in place: one array of the tensor's size
        out.append(Perturbation(name, slice(0, owner.size), moved))
    return out


def narrower_compute_type(
    evaluator: Evaluator, ws: Workspace, f0: float, out_dtype: np.dtype
) -> HiddenType | None:
    """float32 when a float64 forward demonstrably computes in float32, else None (3 calls)."""
    names = [n for n in ws.param_names if ws.owners[n].dtype == np.float64 and ws.owners[n].any()]
    if out_dtype != np.float64 or not names:
        return None
    try:
        rounded = evaluator.loss_with(_moved(ws, names, 0.0))
        nudged = evaluator.loss_with(_moved(ws, names, SMALL))
        moved = evaluator.loss_with(_moved(ws, names, LARGE))
    except (UserCodeError, BadOutputError):
        return None  # the moved points are outside forward's domain: no evidence either way
    expected = abs(moved - rounded) * (SMALL / LARGE)
    resolvable = expected > 64 * np.finfo(np.float64).eps * max(abs(rounded), abs(f0))
    if resolvable and nudged == rounded:
        return HiddenType(
            np.dtype(np.float32),
            " although its params are float64 (moving every param by 2**-36 of its size left "
            "the loss bitwise unchanged)",
        )
    return None
