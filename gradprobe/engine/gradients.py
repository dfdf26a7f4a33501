"""Validating what backward returned: names, shapes, types and finiteness."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import field
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import BadOutputError
from ..common.tensors import Handed, Workspace, emptied, flatten, is_float, is_float_dtype, is_numeric_dtype


@dataclass
class Gradients:
    """Usable gradients (float64, the tensor's shape; see :func:`validate` for narrow ones
    kept in their own type), and a sentence per unusable one."""

    values: dict[str, np.ndarray] = field(default_factory=dict)
    problems: dict[str, str] = field(default_factory=dict)  # known tensor -> what is wrong
    problem_at: dict[str, list[tuple[int, ...]]] = field(default_factory=dict)  # its wrong elements, where known
    unknown: dict[str, tuple[tuple[int, ...], str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _problem(name: str, value: Any, tensor: np.ndarray, own_type: bool = False,
             fresh: bool = False) -> tuple[np.ndarray | None, str | None]:
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
        at = non_finite_at(grad)
        bad = int(grad.size - finite.sum())
        shown = ", ".join(f"{'nan' if np.isnan(grad[i]) else 'inf'} at {list(i)}" for i in at[:3])
        more = f" and {bad - 3} more" if bad > 3 else ""
        return None, f"the gradient for {name} has {bad} non-finite value{'s' if bad > 1 else ''} ({shown}{more})"
    if own_type and is_narrow_float(grad.dtype):
        return (grad if fresh else grad.copy()), None  # exact, and half of a float64 copy or less
    # A gradient a framework's reverse mode made for this call is kept as it is (no second
    # float64 copy of it beside the framework's, even for a moment); any other is copied.
    return grad.astype(np.float64, copy=not fresh), None


def non_finite_at(grad: np.ndarray, most: int = 100) -> list[tuple[int, ...]]:
    """The indices of a gradient's NaN and infinite elements, the first ``most`` of them."""
    flat = np.flatnonzero(~np.isfinite(grad.reshape(-1)))[:most]
    return [tuple(int(v) for v in np.unravel_index(k, grad.shape)) for k in flat]


def is_narrow_float(dtype: np.dtype) -> bool:
    """A real floating type narrower than float64 (float32, float16, bfloat16)."""
    return is_float_dtype(dtype) and np.dtype(dtype).itemsize < 8


def validate(result: Any, ws: Workspace, own_type: bool = False, borrowed: bool = False) -> Gradients:
    """Sort backward's result into usable gradients and problems. ``own_type``: narrow
    floating gradients stay in the type backward returned them in (private copies), for
    :func:`widened` to turn into float64 unless a float64 run replaces them. ``borrowed``:
    the caller reads the gradients and lets go of them before the user's code runs again,
    and never writes into them: arrays already of the type asked for are not copied."""
    if not isinstance(result, Mapping):
        raise BadOutputError(
            "backward must return a mapping of name -> gradient, not "
            + ("None" if result is None else f"a {type(result).__name__}"),
            value=result, fix="return a dict nested like params, e.g. return {'w': grad_w}",
        )
    flat = flatten(result)
    names = set(flat)
    handed = isinstance(result, Handed)
    fresh = borrowed or (isinstance(result, Handed) and result.fresh)
    emptied(result)  # one the boundary built: its arrays are let go of as they are read
    out = Gradients()
    for name in list(flat):
        value = flat.pop(name) if handed else flat[name]
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
        grad, problem = _problem(name, value, tensor, own_type, fresh)
        if problem or grad is None:
            out.problems[name] = problem or f"the gradient for {name} is not usable"
            if problem and "non-finite" in problem:
                out.problem_at[name] = non_finite_at(np.asarray(value))
        else:
            out.values[name] = grad
    for name in ws.param_names:
        if is_float(ws.owners[name]) and name not in names:
            out.problems[name] = f"backward returned no gradient for {name}"
    return out


def widened(grads: Gradients) -> Gradients:
    """``grads`` with every gradient float64, one tensor at a time (no copy of a float64 one)."""
    for name, g in grads.values.items():
        grads.values[name] = g.astype(np.float64, copy=False)
    return grads
