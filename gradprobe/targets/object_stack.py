"""Stacks from layer objects in the common class style, without changes to the user's classes.

    from .object_stack import object_stack

    case = object_stack([Dense(4, 8), Rectify(), Dense(8, 3)], ChoiceLoss(), x, labels)

Each layer has ``forward(x)`` (caching what it needs) and ``backward(grad_y)`` returning the
input gradient and storing its parameter gradients on itself; the loss has
``forward(scores, labels)`` (or ``forward(scores)``) returning a scalar and ``backward()``
returning the gradient of the scores. Parameters are found by a trial call: an array attribute
``W`` whose gradient backward stores as ``dW`` (or ``grads["W"]``), or the arrays of a
``params`` dict attribute; ``grads=`` names them explicitly. Every call, the trial one
included, leaves the objects exactly as they were (:mod:`gradprobe.targets.objstate`).
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from .adapters import Slot, install, own_kind, param_slots, private_copy, stored
from ..common.errors import TargetLoadError
from ..common.tensors import is_float_dtype
from .objstate import preserved
from .stack import StackTarget, stack

LABELS = "labels"


class ObjectLayer:
    """A class-style layer object as a stack layer (protocol section 5)."""

    def __init__(self, name: str, obj: Any, slots: Mapping[str, tuple[Slot, Slot]]) -> None:
        self.name, self.obj, self.slots = name, obj, dict(slots)

    def forward(self, params: Mapping[str, Any], x: Any, inputs: Mapping[str, Any]) -> Any:
        with preserved(self.obj):
            install(self.obj, self.slots, params)
            return own_kind(self.obj.forward(x))

    def backward(self, params: Mapping[str, Any], x: Any, inputs: Mapping[str, Any],
                 grad_y: Any) -> tuple[dict[str, Any], Any]:
        with preserved(self.obj):
            install(self.obj, self.slots, params)
            self.obj.forward(x)  # refresh the caches for these params and this input
            grad_x = own_kind(self.obj.backward(own_kind(grad_y)))
            return stored(self.obj, self.slots), grad_x


class ObjectLoss:
    """A loss object (``forward(scores[, labels])``, ``backward()``) as the last stack layer."""

    def __init__(self, name: str, obj: Any, with_labels: bool) -> None:
        self.name, self.obj, self.with_labels = name, obj, with_labels
        self._takes_grad = _required_arguments(obj.backward) > 0

    def _forward(self, x: Any, inputs: Mapping[str, Any]) -> Any:
        return self.obj.forward(x, inputs[LABELS]) if self.with_labels else self.obj.forward(x)

    def forward(self, params: Mapping[str, Any], x: Any, inputs: Mapping[str, Any]) -> Any:
        with preserved(self.obj):
            return own_kind(self._forward(x, inputs))

    def backward(self, params: Mapping[str, Any], x: Any, inputs: Mapping[str, Any],
                 grad_y: Any) -> tuple[dict[str, Any], Any]:
        with preserved(self.obj):
            self._forward(x, inputs)
            if self._takes_grad:
                return {}, own_kind(self.obj.backward(grad_y))
            return {}, own_kind(self.obj.backward()) * grad_y


def _required_arguments(fn: Any) -> int:
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return 0
    return sum(1 for p in sig.parameters.values()
               if p.default is p.empty and p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD))


def _names(objects: Sequence[Any], given: Sequence[str] | None) -> list[str]:
    if given is not None:
        if len(given) != len(objects):
            raise TargetLoadError(f"{len(given)} names for {len(objects)} layers and the loss")
        return [str(n) for n in given]
    base = [str(o.name) if isinstance(getattr(o, "name", None), str) else type(o).__name__
            for o in objects]
    out = []
    for k, name in enumerate(base):
        out.append(f"{name}{base[:k + 1].count(name)}" if base.count(name) > 1 else name)
    return out


def _float_array(value: Any) -> bool:
    if isinstance(value, np.ndarray):
        return is_float_dtype(value.dtype)  # ml_dtypes' bfloat16 too
    return hasattr(value, "__dlpack__") and "float" in str(getattr(value, "dtype", ""))  # torch, jax, ...


def discover(obj: Any, x: Any) -> tuple[dict[str, str], list[str]]:
    """Parameter -> gradient location, found by one trial forward and backward at ``x``; and
    the other float arrays the calls keep (running statistics: state, not params). Arrays
    the calls rebind are caches and are in neither."""
    held = getattr(obj, "params", None)
    if isinstance(held, Mapping):
        candidates = [f"params.{k}" for k, v in held.items() if _float_array(v)]
    else:
        candidates = [k for k, v in vars(obj).items() if not k.startswith("_") and _float_array(v)]
    found: dict[str, str] = {}
    before = {k: id(v) for k, v in vars(obj).items() if _float_array(v) and not k.startswith("_")}
    with preserved(obj):
        y = obj.forward(x)
        if isinstance(y, np.ndarray) or not hasattr(y, "__dlpack__"):
            obj.backward(np.ones_like(np.asarray(y), dtype=np.float64))
        else:
            obj.backward(y * 0 + 1)  # ones of the layer's own library
        grads = getattr(obj, "grads", None)
        for where in candidates:
            key = where.rpartition(".")[2]
            value = Slot("params", key).get(obj) if where.startswith("params.") else getattr(obj, key)
            for location in (f"d{key}", f"grads.{key}"):
                place = Slot(*location.split(".")) if "." in location else Slot(location)
                if location.startswith("grads.") and not isinstance(grads, Mapping):
                    continue
                stored_value = place.get(obj)
                if _float_array(stored_value) and tuple(stored_value.shape) == tuple(value.shape):
                    found[where] = location
                    break
        kept = [k for k, i in before.items() if id(getattr(obj, k, None)) == i]
    gradients = {location for location in found.values()}
    return found, [k for k in kept if k not in found and k not in gradients]


def object_stack(
    layers: Sequence[Any],
    loss: Any,
    x: Any,
    labels: Any = None,
    *,
    names: Sequence[str] | None = None,
    grads: Mapping[str, Mapping[str, str]] | None = None,
    label: str = "<object stack>",
) -> StackTarget:
    """A stack from class-style layer objects and a loss object, checked at input ``x``
    (and ``labels``, passed to the loss). ``names``: one per layer and one for the loss
    (default: each object's ``name``, else its class name, numbered when repeated).
    ``grads``: for a layer name, its parameters and where backward stores their gradients,
    as for :func:`gradprobe.targets.adapters.layer_target`; other layers are discovered."""
    objects = [*layers, loss]
    for k, obj in enumerate(objects):
        for method in ("forward", "backward"):
            if not callable(getattr(obj, method, None)):
                what = "the loss" if k == len(layers) else f"layer {k}"
                raise TargetLoadError(f"{what} ({type(obj).__name__}) has no {method} method")
    all_names = _names(objects, names)
    x_private = private_copy(x)  # the layers run on it below: the caller's x stays as it is
    wrapped: list[Any] = []
    params: dict[str, dict[str, np.ndarray]] = {}
    activation = x_private
    notes = []
    with preserved(*objects):
        for name, obj in zip(all_names[:-1], layers):
            chosen = (grads or {}).get(name)
            others: list[str] = []
            if chosen is None:
                chosen, others = discover(obj, activation)
            slots = param_slots(obj, chosen)
            if others:
                notes.append(f"layer {name}: {', '.join(others)} taken as state, not params (no "
                             "gradient stored for them; name them with grads= to check them)")
            wrapped.append(ObjectLayer(name, obj, slots))
            if slots:
                params[name] = {n: private_copy(place.get(obj)) for n, (place, _) in slots.items()}
            activation = own_kind(obj.forward(activation))
    inputs: dict[str, Any] = {"x": x_private}
    if labels is not None:
        inputs[LABELS] = private_copy(labels)
    wrapped.append(ObjectLoss(all_names[-1], loss, labels is not None))
    return replace(stack(wrapped, params, inputs, label), notes=tuple(notes))
