"""Calls made before any perturbation: what the forward returns, whether it is repeatable,
and whether forward or backward write into the arrays they are given."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import (
    BadOutputError,
    InPlaceWriteError,
    NondeterminismError,
    ProbeError,
    UserCodeError,
    summarise,
)
from ..common.tensors import Workspace, is_float_dtype
from ..targets.target import framework_fix
from .evaluate import output_to_loss
from .evaluator import Evaluator


@dataclass(frozen=True)
class ForwardInfo:
    f0: float  # the loss at the base point
    out_dtype: np.dtype  # the floating type of forward's result
    grad_output: np.ndarray | None  # drawn when forward returns an array
    # The size of the terms the loss is summed from: |f0| for a scalar loss, and
    # sum |grad_output * out| for an array output (whose sum of signed terms can be far
    # smaller than the terms that round).
    terms: float = 0.0


def _name_writes(ws: Workspace, flat: dict[str, np.ndarray], who: str) -> None:
    changed = ws.changed(flat)
    if changed:
        names = ", ".join(f"{ws.kind(n)} {n}" for n in changed)
        raise InPlaceWriteError(f"{who} writes into the arrays it is given ({names})", value=changed)


def _result_dtype(out: Any) -> np.dtype:
    array = np.asarray(out)
    if is_float_dtype(array.dtype):
        return array.dtype
    if np.issubdtype(array.dtype, np.complexfloating):
        return np.finfo(array.dtype).dtype
    return np.dtype(np.float64)  # Python ints, bools: assume double precision


def _trees(ws: Workspace, scratch: bool) -> tuple[Any, Any, dict[str, np.ndarray] | None]:
    if scratch:
        return ws.scratch_trees()
    return ws.params_tree, ws.inputs_tree, None


SIGNATURES = {
    "forward": "forward must take (params, inputs)",
    "backward": "backward must take (params, inputs)",
    "vjp": "backward must take (params, inputs, grad_output), since forward returns an array",
}


def _signature_fix(exc: Exception, who: str, vjp: bool = False) -> str | None:
    """For a call that failed on its arguments (a TypeError about how many were given), the
    signature gradprobe calls it with; for a framework or a GPU that is not there, how to get
    it (as when setup asks for one); None (the error's own fix) otherwise."""
    if not (isinstance(exc, TypeError) and "positional argument" in str(exc)):
        return framework_fix(exc)
    return SIGNATURES["vjp" if vjp else who]


def inspect_forward(
    forward: Callable[..., Any], ws: Workspace, evaluator: Evaluator, rng: np.random.Generator,
    scratch: bool = True,
) -> ForwardInfo:
    """Two base calls: one on writable scratch copies (to name in-place writes; with
    ``scratch`` false, for code already seen not to write, on the read-only views), one on
    the read-only views; they must agree."""
    params, inputs, flat = _trees(ws, scratch)
    try:
        out = evaluator.raw(params, inputs)
    except ProbeError:
        raise  # the array boundary's own sentence (an in-place write)
    except Exception as exc:
        raise UserCodeError(f"forward raised {summarise(exc)}", fix=_signature_fix(exc, "forward")) from exc
    if flat is not None:
        _name_writes(ws, flat, "forward")
    grad_output = None
    shape = np.shape(out) if not isinstance(out, (tuple, list, str, bytes, dict)) else ()
    if int(np.prod(shape, dtype=np.int64)) != 1 and np.ndim(out) > 0:
        grad_output = rng.standard_normal(shape)
    first = output_to_loss(out, grad_output, "")
    if isinstance(first, complex):
        raise BadOutputError(
            f"forward returned a complex result ({np.asarray(out).dtype}) at real params, not a "
            "real loss", value=out,
            fix="return a real number: take np.real(...) of a complex computation, or keep "
                "forward in real arithmetic")
    evaluator.loss.grad_output = grad_output
    second = evaluator.base()
    dtype = _result_dtype(out)
    _same_loss(first, second, dtype)
    terms = abs(second)
    if grad_output is not None:
        with np.errstate(all="ignore"):
            terms = max(terms, float(np.sum(np.abs(grad_output * np.asarray(out, dtype=np.float64)))))
    return ForwardInfo(f0=second, out_dtype=dtype, grad_output=grad_output, terms=terms)


def _same_loss(first: float | complex, second: float | complex, dtype: np.dtype) -> None:
    """Two losses at the same arguments must agree to the loss type's rounding."""
    tol = 16 * float(np.finfo(dtype).eps) * max(abs(first), abs(second))
    if not abs(first - second) <= tol:
        raise NondeterminismError(
            f"forward is not deterministic: two calls with the same arguments gave "
            f"{first!r} and {second!r} (random state or dropout?)",
            value=(first, second),
        )


RECHECKS = 6  # calls at the unmoved point: two equal masks of two dropout units pass them 1 in 4**6


def confirm_deterministic(evaluator: Evaluator, f0: float, *dtypes: np.dtype) -> None:
    """Calls at the unmoved point again, all of which must give ``f0`` to the rounding of
    the coarsest of ``dtypes``.

    The two first calls can agree by chance when forward draws few random values (dropout
    over two units agrees 1 time in 4); the moved points' scatter then leaves tensors
    undecided or failing, which would blame the gradient. Made only for such runs.
    """
    coarsest = max(dtypes, key=lambda d: np.finfo(d).eps)
    for _ in range(RECHECKS):
        _same_loss(f0, evaluator.base(), coarsest)


def call_backward(
    backward: Callable[..., Any], ws: Workspace, grad_output: np.ndarray | None,
    scratch: bool = True,
) -> Any:
    """backward on scratch copies; in-place writes are named (``scratch`` as for
    :func:`inspect_forward`)."""
    params, inputs, flat = _trees(ws, scratch)
    args: tuple[Any, ...] = (params, inputs)
    if grad_output is not None:
        args += (grad_output.copy(),)
    try:
        result = backward(*args)
    except ProbeError:
        raise  # an adapter's own, already one sentence
    except Exception as exc:
        raise UserCodeError(f"backward raised {summarise(exc)}",
                            fix=_signature_fix(exc, "backward", grad_output is not None)) from exc
    if flat is not None:
        _name_writes(ws, flat, "backward")
    return result
