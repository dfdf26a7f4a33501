"""Layer stacks (protocol section 5): reading them, composing them, and splitting them.

A stack is a list of layers, each with ``forward(params, x, inputs) -> y`` and
``backward(params, x, inputs, grad_y) -> (grads, grad_x)``; the last layer returns the scalar
loss. From a :class:`StackTarget` this module builds ordinary :class:`~gradprobe.targets.target.Target`
objects for the engine: :func:`end_to_end` (the whole network, forward and backward composed
here); :mod:`gradprobe.targets.stack_split` gives each layer on its own.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import field
from typing import Any

import numpy as np

from ..common.classes import dataclass
from ..common.errors import (
    BadOutputError,
    TargetLoadError,
    UserCodeError,
    summarise,
)
from ..common.tensors import is_float_dtype
from .target import Target, _arrays, _get

INPUT = "x"  # the inputs key holding the first layer's input
PART = "\x1f"  # separates an entry point from the layer a worker process should load


@dataclass(frozen=True)
class StackTarget:
    """A network given as layers, input side first, with the arrays to check it at."""

    label: str
    names: tuple[str, ...]
    layers: tuple[Any, ...]
    params: Mapping[str, Any]
    inputs: Mapping[str, Any] = field(default_factory=dict)
    spec: str | None = None
    notes: tuple[str, ...] = ()  # what building the stack noticed, for the report
    loader: Callable[[str], Callable[..., Any]] | None = field(default=None, compare=False)  # see Target


def is_stack(obj: Any) -> bool:
    """A target object that gives ``layers`` and no ``forward`` of its own."""
    return _get(obj, "layers") is not None and _get(obj, "forward") is None


def named_layers(layers: Any) -> tuple[tuple[str, ...], tuple[Any, ...]]:
    if isinstance(layers, Mapping):
        pairs = [(str(k), v) for k, v in layers.items()]
    elif isinstance(layers, Sequence) and not isinstance(layers, (str, bytes)):
        pairs = []
        for k, layer in enumerate(layers):
            name = getattr(layer, "name", None)
            if not isinstance(name, str) or not name:
                raise TargetLoadError(
                    f"layer {k} of the stack has no name (give each layer a name attribute, "
                    "or give layers as a mapping name -> layer)", value=layer)
            pairs.append((name, layer))
    else:
        raise TargetLoadError(
            f"layers must be a sequence of named layers or a mapping name -> layer, not "
            f"{type(layers).__name__}", value=layers)
    if not pairs:
        raise TargetLoadError("the stack has no layers", value=layers)
    names = [n for n, _ in pairs]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise TargetLoadError(f"two layers of the stack are named {twice[0]!r}", value=twice)
    for name, layer in pairs:
        for method in ("forward", "backward"):
            if not callable(getattr(layer, method, None)):
                raise TargetLoadError(f"layer {name} has no {method} function", value=layer)
    return tuple(names), tuple(layer for _, layer in pairs)


def stack_from_object(obj: Any, label: str, spec: str | None = None) -> StackTarget:
    """Read ``layers`` and the arrays off a stack target object."""
    names, layers = named_layers(_get(obj, "layers"))
    params, inputs = _arrays(obj)
    if INPUT not in inputs:
        raise TargetLoadError("a stack's inputs must hold x, the first layer's input", value=inputs)
    unknown = [k for k in params if k not in names]
    if unknown:
        raise TargetLoadError(
            f"params has {unknown[0]!r}, which is not a layer of the stack "
            f"(layers: {', '.join(names)})", value=unknown)
    for name in names:
        if name in params and not isinstance(params[name], Mapping):
            raise TargetLoadError(
                f"params[{name!r}] must be a mapping of name -> array (the layer's own params)",
                value=params[name])
    return StackTarget(label, names, layers, params, inputs, spec)


def stack(layers: Any, params: Mapping[str, Any], inputs: Mapping[str, Any],
          label: str = "<stack>") -> StackTarget:
    """A stack from layers and arrays given directly (the Python entry)."""
    return stack_from_object({"layers": layers, "params": params, "inputs": inputs}, label)


# -- calling the user's layers, with one sentence naming the layer when they fail ----------

def call_layer_forward(name: str, layer: Any, p: Any, x: Any, inputs: Any) -> Any:
    try:
        return layer.forward(p, x, inputs)
    except KeyboardInterrupt:
        raise
    except Exception as exc:
        if isinstance(exc, (UserCodeError, TargetLoadError)):
            raise
        raise StackLayerError(name, "forward", exc) from exc


def call_layer_backward(name: str, layer: Any, p: Any, x: Any, inputs: Any, grad_y: Any) -> tuple[Any, Any]:
    try:
        result = layer.backward(p, x, inputs, grad_y)
    except KeyboardInterrupt:
        raise
    except TargetLoadError:
        raise
    except Exception as exc:
        raise UserCodeError(f"layer {name}'s backward raised {summarise(exc)}") from exc
    if not (isinstance(result, tuple) and len(result) == 2):
        got = f"a tuple of {len(result)}" if isinstance(result, tuple) else type(result).__name__
        raise BadOutputError(f"layer {name}'s backward must return (grads, grad_x) but returned {got}",
                             value=result, fix="return the pair: grads nested like the layer's params "
                                               "({} when it has none) and the gradient of its input x")
    return result


class StackLayerError(Exception):
    """A layer's forward raised; its message names the layer (the engine adds 'forward raised')."""

    def __init__(self, name: str, what: str, exc: BaseException) -> None:
        super().__init__(f"in layer {name}: {summarise(exc)}")
        self.name, self.original = name, exc


# -- the whole network -----------------------------------------------------------------------

class ComposedForward:
    """The network's loss: each layer's forward applied in turn (picklable when layers are)."""

    def __init__(self, names: tuple[str, ...], layers: tuple[Any, ...]) -> None:
        self.names, self.layers = names, layers

    def activations(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> list[Any]:
        """The input of every layer, then the loss."""
        acts = [inputs[INPUT]]
        for name, layer in zip(self.names, self.layers):
            acts.append(call_layer_forward(name, layer, params.get(name, {}), acts[-1], inputs))
        return acts

    def __call__(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> Any:
        return self.activations(params, inputs)[-1]


class ComposedBackward:
    """The network's gradient by the chain rule over the layers' own backward functions.

    A layer whose input gradient cannot be passed on (a shape other than its input's) stops
    the chain: the layers before it get no gradient, so their tensors fail as missing, and
    the blame names the layer that broke the chain.
    """

    def __init__(self, forward: ComposedForward) -> None:
        self.forward = forward

    def __call__(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> dict[str, Any]:
        names, layers = self.forward.names, self.forward.layers
        acts = self.forward.activations(params, inputs)
        grads: dict[str, Any] = {}
        grad_y: Any = 1.0
        for k in range(len(layers) - 1, -1, -1):
            p = params.get(names[k], {})
            own, grad_x = call_layer_backward(names[k], layers[k], p, acts[k], inputs, grad_y)
            if names[k] in params or not (isinstance(own, Mapping) and not own):
                # (grads from a layer without params are passed on: unknown names)
                grads[names[k]] = own
            if np.shape(grad_x) != np.shape(acts[k]):
                return grads
            grad_y = grad_x
        if floating(inputs[INPUT]):
            grads[INPUT] = grad_y
        return grads


def floating(value: Any) -> bool:
    return is_float_dtype(np.asarray(value).dtype)  # ml_dtypes' bfloat16 too


def end_to_end(st: StackTarget) -> Target:
    """The whole stack as one flat target (forward and backward composed here)."""
    fwd = ComposedForward(st.names, st.layers)
    return Target(st.label, fwd, ComposedBackward(fwd), st.params, st.inputs, st.spec, st.loader)
