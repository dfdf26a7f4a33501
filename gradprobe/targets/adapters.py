"""Targets from stateful layer objects, without changes to the user's class.

The common object style: ``layer.forward(x)`` returns the output and caches what backward
needs; ``layer.backward(grad_y)`` returns the input gradient and stores each parameter's
gradient on the layer (``layer.dW`` for ``layer.W``, or ``layer.grads["W"]`` for
``layer.params["W"]``). :func:`layer_target` wraps such a layer: each call puts gradprobe's
(private, read-only) copies of the parameters on the layer, runs it, and then puts the whole
object back as it was (parameters, caches, counters, running statistics; see
:mod:`gradprobe.targets.objstate`), also when the call fails or is interrupted.
:mod:`gradprobe.targets.object_stack` does the same for a list of such layers and a loss.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import TargetLoadError
from .objstate import preserved
from .target import Target


@dataclass(frozen=True)
class Slot:
    """Where an array lives on a layer: ``layer.<attr>``, or ``layer.<attr>[<key>]`` when
    ``key`` is set (parameters held in a dict attribute)."""

    attr: str
    key: str | None = None

    @property
    def label(self) -> str:
        return f"layer.{self.attr}" + (f"[{self.key!r}]" if self.key is not None else "")

    def get(self, layer: Any, default: Any = None) -> Any:
        holder = getattr(layer, self.attr, None)
        if self.key is None:
            return default if holder is None else holder
        return holder.get(self.key, default) if isinstance(holder, Mapping) else default

    def put(self, layer: Any, value: Any) -> None:
        if self.key is None:
            setattr(layer, self.attr, value)
        else:
            getattr(layer, self.attr)[self.key] = value


def slot(layer: Any, where: str, holder: str = "params") -> Slot:
    """``"W"``: the attribute ``W``, else ``layer.<holder>["W"]``; ``"params.W"``:
    ``layer.params["W"]`` explicitly."""
    attr, dot, key = where.partition(".")
    if dot:
        return Slot(attr, key)
    if holder and not hasattr(layer, where) and isinstance(getattr(layer, holder, None), Mapping):
        return Slot(holder, where)
    return Slot(where)


def short_name(where: str) -> str:
    return where.rpartition(".")[2]


def param_slots(layer: Any, grads: Mapping[str, str]) -> dict[str, tuple[Slot, Slot]]:
    """Each parameter's name -> (where it lives, where backward stores its gradient)."""
    found = {}
    for where, grad in grads.items():
        place = slot(layer, where)
        if place.get(layer) is None:
            raise TargetLoadError(f"the layer {type(layer).__name__} has no attribute {where!r}")
        found[short_name(where)] = (place, slot(layer, grad, holder="grads"))
    return found


def install(layer: Any, slots: Mapping[str, tuple[Slot, Slot]], values: Mapping[str, Any]) -> None:
    """Put ``values`` in the parameter slots and clear the gradient slots (so a gradient that
    backward does not store is noticed, not read stale)."""
    for name, (place, grad) in slots.items():
        place.put(layer, values[name])
        if grad.key is None or isinstance(getattr(layer, grad.attr, None), dict):
            grad.put(layer, None)


def stored(layer: Any, slots: Mapping[str, tuple[Slot, Slot]]) -> dict[str, np.ndarray]:
    """The gradients backward stored, copied before the layer is put back."""
    out = {}
    for name, (_, grad) in slots.items():
        value = grad.get(layer)
        if value is None:
            raise TargetLoadError(f"backward stored no gradient in {grad.label} for {name}")
        out[name] = own_kind(value)
    return out


def private_copy(value: Any) -> Any:
    """A copy of ``value`` that the caller's code cannot reach: numpy's, or one of its own
    library (a torch tensor cloned off its graph; an array-API array copied by its namespace;
    immutable arrays such as JAX's as they are)."""
    if isinstance(value, np.ndarray) or not hasattr(value, "__dlpack__"):
        return np.array(value, copy=True)
    if callable(getattr(value, "clone", None)) and callable(getattr(value, "detach", None)):
        return value.detach().clone()  # torch
    try:
        return value.__array_namespace__().asarray(value, copy=True)
    except Exception:  # noqa: BLE001 - a library without copies (JAX arrays are immutable)
        return value


def own_kind(value: Any) -> Any:
    """A private numpy copy of ``value``, or ``value`` itself when it is an array of another
    library (torch, JAX, array-api-strict: protocol section 6), so that the layer is run
    with arrays of its own library, which the engine copies and converts at each call."""
    if isinstance(value, np.ndarray) or not hasattr(value, "__dlpack__"):
        return np.array(value, copy=True)
    return value


def layer_target(
    layer: Any,
    x: Any,
    grads: Mapping[str, str],
    *,
    input_name: str = "x",
    name: str | None = None,
    label: str | None = None,
) -> Target:
    """A target checking ``layer``'s parameters (the keys of ``grads``) and its input gradient.

    ``grads`` maps each parameter to where ``layer.backward`` stores its gradient, e.g.
    ``{"W": "dW", "b": "db"}``, or ``{"W": "grads.W"}`` for ``layer.grads["W"]``; a
    parameter not found as an attribute is looked up in ``layer.params``. The check is of
    ``sum(g * layer.forward(x))`` with gradprobe's seeded ``g``; ``layer.backward(g)`` must
    return the gradient of ``x``. The parameters are reported in the layer ``name`` (default:
    the class name).
    """
    name = name or type(layer).__name__
    for method in ("forward", "backward"):
        if not callable(getattr(layer, method, None)):
            raise TargetLoadError(f"the layer {type(layer).__name__} has no {method} method")
    slots = param_slots(layer, grads)
    params = {name: {n: private_copy(place.get(layer)) for n, (place, _) in slots.items()}}
    inputs = {input_name: private_copy(x)}

    def forward(p: Mapping[str, Any], i: Mapping[str, Any]) -> Any:
        with preserved(layer):
            install(layer, slots, p[name])
            return own_kind(layer.forward(i[input_name]))

    def backward(p: Mapping[str, Any], i: Mapping[str, Any], grad_output: np.ndarray) -> dict:
        with preserved(layer):
            install(layer, slots, p[name])
            layer.forward(i[input_name])  # refresh the caches for these params
            dx = own_kind(layer.backward(grad_output))
            found = stored(layer, slots)
        return {name: found, input_name: dx}

    return Target(label or f"{name} layer", forward, backward, params, inputs)
