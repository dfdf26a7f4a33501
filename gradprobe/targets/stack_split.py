"""Each layer of a stack as a small target of its own, at the activation that reaches it.

The layer's params and its input activation (a private copy, computed by the composed forward
at the base point) are the target's params, so the engine checks both its parameter gradients
and its input gradient; for a layer that returns an array the engine draws the upstream
gradient, for the loss layer it is 1.0. Other arrays of ``inputs`` pass through unperturbed.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import BadOutputError, UserCodeError, summarise
from .stack import (
    INPUT,
    PART,
    ComposedBackward,
    ComposedForward,
    StackLayerError,
    StackTarget,
    call_layer_backward,
    call_layer_forward,
    floating,
    is_stack,
    named_layers,
)
from .target import Target, _get
from ..common.tensors import Workspace, flatten


def input_key(params: Mapping[str, Any]) -> str:
    """The name under which a layer's input sits among its own params (x, unless taken)."""
    key = INPUT
    while key in params:
        key += "_in"
    return key


class LayerForward:
    """One layer as a target's forward: its params and its input activation are the params."""

    def __init__(self, name: str, layer: Any, key: str) -> None:
        self.name, self.layer, self.key = name, layer, key

    def split(self, params: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
        mine = dict(params[self.name])
        x = mine.pop(self.key)
        return mine, x

    def __call__(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> Any:
        mine, x = self.split(params)
        return call_layer_forward(self.name, self.layer, mine, x, inputs)


class LayerBackward:
    """One layer's backward for the engine's upstream gradient (1.0 for the loss layer)."""

    def __init__(self, forward: LayerForward) -> None:
        self.forward = forward

    def __call__(self, params: Mapping[str, Any], inputs: Mapping[str, Any],
                 grad_output: Any = 1.0) -> dict[str, Any]:
        f = self.forward
        mine, x = f.split(params)
        own, grad_x = call_layer_backward(f.name, f.layer, mine, x, inputs, grad_output)
        if not isinstance(own, Mapping):
            raise BadOutputError(
                f"layer {f.name}'s backward must return its grads as a mapping, not "
                f"{type(own).__name__}", value=own,
                fix="return (grads, grad_x), grads nested like the layer's params ({} when it has none)")
        out = dict(own)
        if floating(x):
            out[f.key] = grad_x
        return {f.name: out}


@dataclass(frozen=True)
class LayerPart:
    """One layer's own check: its target and where its input sits among the params."""

    name: str
    target: Target
    input_name: str  # the tensor name of the layer's input in this target
    checkable: bool  # False when the layer has no floating-point array to perturb


def base_activations(st: StackTarget) -> list[np.ndarray]:
    """The input of every layer at the base point, as private arrays (then the loss)."""
    params, inputs, _ = Workspace(st.params, st.inputs).scratch_trees()
    fwd = ComposedForward(st.names, st.layers)
    try:
        acts = fwd.activations(params, inputs)
    except StackLayerError as exc:
        raise UserCodeError(f"layer {exc.name}'s forward raised {summarise(exc.original)}") from exc.original
    out = []
    for k, act in enumerate(acts[:-1]):
        if isinstance(act, (tuple, list, dict, str, bytes)) or act is None:
            raise BadOutputError(
                f"layer {st.names[k - 1]}'s forward returned a {type(act).__name__}, not an array",
                value=act, fix="return one array, the activation the next layer takes")
        out.append(np.array(act, copy=True))
    if np.size(acts[-1]) != 1:
        raise BadOutputError(
            f"the last layer, {st.names[-1]}, must return the scalar loss but returned shape "
            f"{np.shape(acts[-1])}", value=acts[-1], fix="sum or average it to one number there")
    return out


def layer_targets(st: StackTarget, activations: list[np.ndarray]) -> list[LayerPart]:
    """Each layer as a small target at the activation that reaches it."""
    parts = []
    for k, (name, layer) in enumerate(zip(st.names, st.layers)):
        own = dict(st.params.get(name, {}))
        key = input_key(own)
        fwd = LayerForward(name, layer, key)
        params = {name: {**own, key: activations[k]}}
        spec = None if st.spec is None else PART.join((st.spec, name, key))
        target = Target(f"{st.label}: layer {name} on its own", fwd, LayerBackward(fwd), params, st.inputs,
                        spec, st.loader)
        checkable = any(floating(v) for v in flatten(params).values())
        parts.append(LayerPart(name, target, f"{name}.{key}", checkable))
    return parts


def worker_functions(obj: Any, spec: str) -> tuple[Any, Any] | None:
    """forward and backward for a worker process, when ``obj`` (resolved from ``spec``) is a
    stack: the composed ones, or one layer's when ``spec`` names a layer; None otherwise."""
    part = spec.split(PART)[1:]
    if not is_stack(obj):
        return None
    names, layers = named_layers(_get(obj, "layers"))
    if not part:
        fwd = ComposedForward(names, layers)
        return fwd, ComposedBackward(fwd)
    name, key = part
    lf = LayerForward(name, layers[names.index(name)], key)
    return lf, LayerBackward(lf)
