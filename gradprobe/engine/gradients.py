"""Validating what backward returned: names, shapes, types and finiteness."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..common.errors import BadOutputError
from ..common.tensors import Workspace, flatten, is_float, is_numeric_dtype


@dataclass
class Gradients:
    """Usable gradients (float64, the tensor's shape), and a sentence per unusable one."""

    values: dict[str, np.ndarray] = field(default_factory=dict)
    problems: dict[str, str] = field(default_factory=dict)  # known tensor -> what is wrong
    unknown: dict[str, tuple[tuple[int, ...], str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _problem(name: str, value: Any, tensor: np.ndarray) -> tuple[np.ndarray | None, str | None]:
    try:
        grad = np.asarray(value)
    except Exception:
        return None, f"the gradient for {name} is not an array ({type(value).__name__})"
    if not is_numeric_dtype(grad.dtype) or np.issubdtype(grad.dtype, np.complexfloating):
        return None, f"the gradient for {name} is not real numbers (dtype {grad.dtype})"
    if grad.shape != tensor.shape:
        if grad.ndim == tensor.ndim >= 2 and grad.shape == tensor.shape[::-1]:
            return None, (
                f"the gradient for {name} has shape {grad.shape}, the transpose of the tensor's "
                f"{tensor.shape}: a transpose is missing"
            )
        return None, f"the gradient for {name} has shape {grad.shape} but the tensor is {tensor.shape}"
    finite = np.isfinite(grad)
    if not finite.all():
        bad = int(grad.size - finite.sum())
        return None, f"the gradient for {name} has {bad} non-finite value{'s' if bad > 1 else ''}"
    return grad.astype(np.float64), None


def validate(result: Any, ws: Workspace) -> Gradients:
    """Sort backward's result into usable gradients and problems."""
    if not isinstance(result, Mapping):
        raise BadOutputError(
            f"backward must return a mapping of name -> gradient, not a {type(result).__name__}",
            value=result,
        )
    flat = flatten(result)
    out = Gradients()
    for name, value in flat.items():
        tensor = ws.owners.get(name)
        if tensor is None:
            shape = tuple(np.shape(value)) if np.ndim(value) else ()
            out.unknown[name] = (
                shape,
                f"backward returned a gradient for {name!r}, which is neither a param nor an input",
            )
            continue
        if not is_float(tensor):
            out.notes.append(f"the gradient returned for {name} is ignored: its dtype is {tensor.dtype}")
            continue
        grad, problem = _problem(name, value, tensor)
        if problem or grad is None:
            out.problems[name] = problem or f"the gradient for {name} is not usable"
        else:
            out.values[name] = grad
    for name in ws.param_names:
        if is_float(ws.owners[name]) and name not in flat:
            out.problems[name] = f"backward returned no gradient for {name}"
    return out
