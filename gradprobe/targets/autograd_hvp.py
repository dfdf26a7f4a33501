"""Second derivatives of forward-only targets: Hessian-vector products by double backward.

A torch or JAX target that sets ``second_order = True`` (protocol section 7) has its Hessian
taken through the framework: ``H v`` is the framework's gradient of ``gradient · v`` (torch:
``autograd.grad`` of the product over a graph kept with ``create_graph``; JAX: reverse mode
of its own reverse mode). That runs every hand-written rule's backward once more, now as a
function to differentiate, so a rule whose backward uses a value the framework cannot see
through (an intermediate saved by an autograd Function's forward, a ``stop_gradient`` or
``detach``) gives a wrong ``H v`` while its gradient is right. :class:`DoubleBackward` is the
``hvp(params, inputs, v)`` the engine checks (:class:`~gradprobe.engine.second_source.HvpSource`),
called with the engine's numpy arrays and giving numpy back.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from .autograd import _substituted, _wrt, jax_vjp, torch_vjp
from .boundary import Boundary
from ..common.errors import ProbeError, UserCodeError, summarise
from ..common.tensors import nested
from ..common.tensors import flatten

FORM = "autograd"  # second_order.form in the report


def torch_hvp(forward: Callable[..., Any], params: Any, inputs: Any, wrt: Mapping[str, Any],
              v: Mapping[str, Any]) -> dict[str, Any]:
    """The gradient of ``sum_n grad_n · v_n`` with respect to ``wrt`` (leaf tensors that
    forward uses inside ``params``); zeros where the gradient does not depend on a tensor
    through the graph (as the framework sees it)."""
    import torch

    for t in wrt.values():
        t.requires_grad_(True)
    with torch.enable_grad():
        _, grads = torch_vjp(forward, params, inputs, wrt, create_graph=True)
        dot = sum((g * v[n].to(g.dtype)).sum() for n, g in grads.items())
        if not isinstance(dot, torch.Tensor) or not dot.requires_grad:
            return {n: torch.zeros_like(t).detach() for n, t in wrt.items()}
        found = torch.autograd.grad(dot, list(wrt.values()), allow_unused=True)
    return {n: (torch.zeros_like(t) if h is None else h).detach()
            for (n, t), h in zip(wrt.items(), found)}


def jax_hvp(forward: Callable[..., Any], params: Any, inputs: Any, wrt: Mapping[str, Any],
            v: Mapping[str, Any]) -> dict[str, Any]:
    """As :func:`torch_hvp`, with JAX's reverse mode of :func:`~gradprobe.targets.autograd.jax_vjp`
    (forward mode is not used: a ``custom_vjp`` rule has none)."""
    import jax
    import jax.numpy as jnp

    names = list(wrt)

    def along(*values: Any) -> Any:
        moved = dict(zip(names, values))
        p, i = _substituted(params, inputs, moved)
        grads = jax_vjp(forward, p, i, moved)[1]
        return sum(jnp.vdot(grads[n], jnp.asarray(v[n], dtype=grads[n].dtype)) for n in names)

    found = jax.grad(along, argnums=tuple(range(len(names))))(*wrt.values())
    return dict(zip(names, found))


class DoubleBackward:
    """``hvp(params, inputs, v)`` on the engine's numpy arrays, by the framework's double
    backward of the user's forward, with the user's library, dtype and device."""

    form = FORM

    def __init__(self, forward: Callable[..., Any], boundary: Boundary, library: str) -> None:
        self.forward = forward
        self.boundary = boundary
        self.library = library
        self.calls = 0  # forward's calls made here: the report's evaluations count them too

    def _forward(self, params: Any, inputs: Any) -> Any:
        self.calls += 1
        return self.forward(params, inputs)

    def __call__(self, params: Any, inputs: Any, v: Any) -> dict[str, Any]:
        b = self.boundary
        made: dict[str, Any] = {}
        names = flatten(params)
        with b.precision(params, inputs):
            p, i = b.user_tree(params, made), b.user_tree(inputs, made)
            wrt = {n: made[n] for n in _wrt(b, self.library) if n in made and n in names}
            directions = {n: b.like(value, n, {}) for n, value in flatten(v).items() if n in wrt}
            try:
                if self.library == "torch":
                    found = torch_hvp(self._forward, p, i, wrt, directions)
                else:
                    found = jax_hvp(self._forward, p, i, wrt, directions)
            except ProbeError:
                raise
            except Exception as exc:
                raise UserCodeError(f"forward's double backward (second_order = True) raised "
                                    f"{summarise(exc)}") from exc
            b.check_writes({n: t for n, t in made.items() if n not in wrt}, "forward")
            flat = {n: b.result(h) for n, h in found.items()}

        return nested(params, flat)
