"""Forward-only targets: the analytic gradient from the framework's own reverse mode.

A target written with PyTorch or JAX may give ``forward`` alone; its gradient is then the
framework's vector-Jacobian product of forward with the upstream gradient (1 for a scalar
loss, ``grad_output`` for an array output), which runs every hand-written rule on the path
(an autograd Function's ``backward``, a ``custom_vjp`` rule). :func:`torch_vjp` and
:func:`jax_vjp` work on the user's own arrays and can keep the graph of the product
(``create_graph``), so that second derivatives can differentiate them once more.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from .boundary import Boundary
from ..common.errors import GraphLeftError, InPlaceWriteError, ProbeError, UserCodeError, summarise
from ..common.tensors import Handed, flatten, is_float_dtype, nested, unflatten

LEFT = "forward leaves {lib}'s graph{why}, so no gradient flows back to its params"


def _wrt(boundary: Boundary, library: str) -> list[str]:
    """The tensors differentiated: every floating-point tensor of the framework."""
    return [n for n, k in boundary.kinds.items()
            if k.library == library and is_float_dtype(boundary.dtype_of(k))]


def torch_vjp(forward: Callable[..., Any], params: Any, inputs: Any, wrt: Mapping[str, Any],
              grad_output: Any = None, create_graph: bool = False,
              given: frozenset[str] = frozenset()) -> tuple[Any, dict[str, Any]]:
    """forward's result and the gradient of ``sum(grad_output * forward)`` (of the scalar
    forward when ``grad_output`` is None) with respect to the tensors ``wrt`` (leaves that
    require grad, used inside ``params``/``inputs``); zeros for tensors it does not use, or
    whose rules give no gradient (None), except those named in ``given``, which are left out
    (inputs: their gradient is optional, as a backward's entry for an input is)."""
    import torch

    with torch.enable_grad():
        out = forward(params, inputs)
        if not isinstance(out, torch.Tensor):
            raise GraphLeftError(LEFT.format(lib="torch", why=f" (it returns a {type(out).__name__})"))
        if not out.requires_grad:
            raise GraphLeftError(LEFT.format(lib="torch", why=" (its result does not depend on "
                                             "any tensor through torch operations)"))
        seed = torch.ones_like(out) if grad_output is None else grad_output.to(out.dtype).reshape(out.shape)
        found = torch.autograd.grad(out, list(wrt.values()), grad_outputs=seed, allow_unused=True,
                                    create_graph=create_graph)
    grads = {n: torch.zeros_like(t) if g is None else g for (n, t), g in zip(wrt.items(), found)
             if g is not None or n not in given}
    return out, grads


def torch_rules(out: Any) -> bool:
    """Whether a hand-written autograd Function lies on the graph behind ``out``."""
    import torch

    seen, todo = set(), [out.grad_fn]
    while todo:
        node = todo.pop()
        if node is None or id(node) in seen:
            continue
        seen.add(id(node))
        if isinstance(node, torch.autograd.function.BackwardCFunction):
            return True
        todo.extend(n for n, _ in node.next_functions)
    return False


def jax_vjp(forward: Callable[..., Any], params: Any, inputs: Any, wrt: Mapping[str, Any],
            grad_output: Any = None) -> tuple[Any, dict[str, Any]]:
    """As :func:`torch_vjp`, with JAX's ``vjp`` (which composes with itself for higher
    derivatives); ``wrt`` maps dotted names to the arrays differentiated."""
    import jax
    import jax.numpy as jnp

    names = list(wrt)

    def loss(*values: Any) -> Any:
        p, i = _substituted(params, inputs, dict(zip(names, values)))
        return forward(p, i)

    out, pull = jax.vjp(loss, *wrt.values())
    seed = jnp.ones_like(out) if grad_output is None else jnp.asarray(grad_output, dtype=out.dtype).reshape(out.shape)
    return out, dict(zip(names, pull(seed)))


def jax_rules(forward: Callable[..., Any], params: Any, inputs: Any, wrt: Mapping[str, Any]) -> bool:
    """Whether forward's trace holds a custom_vjp or custom_jvp rule."""
    import jax

    names = list(wrt)

    def loss(*values: Any) -> Any:
        p, i = _substituted(params, inputs, dict(zip(names, values)))
        return forward(p, i)

    return _has_custom(jax.make_jaxpr(loss)(*wrt.values()).jaxpr)


def _has_custom(jaxpr: Any) -> bool:
    """A custom_vjp/custom_jvp rule of the user's (not one of JAX's own, like logaddexp's)."""
    for eqn in jaxpr.eqns:
        if "custom" in eqn.primitive.name and _defined_outside_jax(eqn):
            return True
        for value in eqn.params.values():
            for sub in value if isinstance(value, (list, tuple)) else (value,):
                inner = getattr(sub, "jaxpr", sub)
                if hasattr(inner, "eqns") and _has_custom(inner):
                    return True
    return False


def _defined_outside_jax(eqn: Any) -> bool:
    """Whether the rule was applied by the user's code: the innermost frame outside JAX
    called JAX's custom-derivative machinery directly (JAX's own rules, like logaddexp's,
    are applied from inside JAX's modules)."""
    traceback = getattr(getattr(eqn, "source_info", None), "traceback", None)
    frames = getattr(traceback, "frames", None)
    if not frames:
        return True
    callee = ""
    for frame in frames:  # innermost first
        name = frame.file_name.replace("\\", "/")
        if "/jax/" not in name and "/jaxlib/" not in name:
            return callee.endswith("custom_derivatives.py")
        if not name.endswith("traceback_util.py"):
            callee = name
    return True


def _substituted(params: Any, inputs: Any, values: Mapping[str, Any]) -> tuple[Any, Any]:
    fp, fi = flatten(params), flatten(inputs)
    fp.update({n: v for n, v in values.items() if n in fp})
    fi.update({n: v for n, v in values.items() if n in fi})
    return unflatten(fp, params), unflatten(fi, inputs)


class ReverseMode:
    """``backward(params, inputs[, grad_output])`` on the engine's numpy arrays, computed by
    the framework's reverse mode of the user's forward."""

    def __init__(self, forward: Callable[..., Any], boundary: Boundary, library: str) -> None:
        self.forward = forward
        self.boundary = boundary
        self.library = library
        self.rules: bool | None = None  # a hand-written rule on the path (once known)
        self.calls = 0  # forward's calls made here: the report's evaluations count them too

    def _forward(self, params: Any, inputs: Any) -> Any:
        self.calls += 1
        return self.forward(params, inputs)

    def __call__(self, params: Any, inputs: Any, grad_output: np.ndarray | None = None) -> Any:
        b = self.boundary
        made: dict[str, Any] = {}
        with b.precision(params, inputs):
            p, i = b.user_tree(params, made), b.user_tree(inputs, made)
            wrt = {n: made[n] for n in _wrt(b, self.library) if n in made}
            seed = None if grad_output is None else b.grad_output(grad_output)
            try:
                grads = self._gradients(p, i, wrt, seed)
            except ProbeError:
                raise
            except Exception as exc:
                raise self._explained(exc) from exc
            b.check_writes({n: t for n, t in made.items() if n not in wrt}, "forward")
            flat = {n: b.result(g) for n, g in grads.items()}
        # integer and boolean tensors (labels, indices) have no gradient: nested() leaves them out
        out = Handed({**nested(params, {n: v for n, v in flat.items() if n in flatten(params)}),
                      **nested(inputs, {n: v for n, v in flat.items() if n in flatten(inputs)})})
        out.fresh = True  # made by the framework's reverse mode for this call alone
        return out

    def _gradients(self, p: Any, i: Any, wrt: dict[str, Any], seed: Any) -> dict[str, Any]:
        if self.library == "torch":
            for t in wrt.values():
                t.requires_grad_(True)
            # An input whose rules give no gradient (None: data, not differentiable by
            # design) is not checked, as an input a backward leaves out is not.
            out, grads = torch_vjp(self._forward, p, i, wrt, seed, given=frozenset(flatten(i)))
            if self.rules is None:
                self.rules = torch_rules(out)
            return {n: g.detach() for n, g in grads.items()}
        if self.rules is None:
            self.rules = jax_rules(self._forward, p, i, wrt)
        return jax_vjp(self._forward, p, i, wrt, seed)[1]

    def _explained(self, exc: Exception) -> ProbeError:
        text = str(exc)
        if "in-place" in text or "inplace" in text:
            return InPlaceWriteError(f"forward writes into the arrays it is given ({summarise(exc)})")
        if ("numpy()" in text or "Tracer" in type(exc).__name__ or "Concretization" in type(exc).__name__
                or "not a valid JAX type" in text or "__array__" in text):
            return GraphLeftError(LEFT.format(lib=self.library, why=f" ({summarise(exc)})"))
        return UserCodeError(f"forward, or a hand-written rule's backward on its path, raised "
                             f"{summarise(exc)} while {self.library} took its gradient")
