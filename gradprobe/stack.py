"""Layer stacks (protocol section 5): reading them, composing them, and splitting them.

A stack is a list of layers, each with ``forward(params, x, inputs) -> y`` and
``backward(params, x, inputs, grad_y) -> (grads, grad_x)``; the last layer returns the scalar
loss. From a :class:`StackTarget` this module builds ordinary :class:`~gradprobe.target.Target`
objects for the engine: :func:`end_to_end` (the whole network, forward and backward composed
here) and :func:`layer_targets` (each layer on its own, at the activation that reaches it).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import BadOutputError, TargetLoadError, UserCodeError, summarise
from .target import Target, _arrays, _get, resolve_object, target_from_object

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


def is_stack(obj: Any) -> bool:
    """A target object that gives ``layers`` and no ``forward`` of its own."""
    return _get(obj, "layers") is not None and _get(obj, "forward") is None


def _named_layers(layers: Any) -> tuple[tuple[str, ...], tuple[Any, ...]]:
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
    names, layers = _named_layers(_get(obj, "layers"))
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


def load_any(spec: str) -> Target | StackTarget:
    """The target named by ``spec``: a stack when it gives ``layers``, else a flat target."""
    try:
        obj = resolve_object(spec)
        if is_stack(obj):
            return stack_from_object(obj, label=spec, spec=spec)
        return target_from_object(obj, label=spec, spec=spec)
    except TargetLoadError as exc:
        raise exc.with_target(spec)


# -- calling the user's layers, with one sentence naming the layer when they fail ----------

def _forward(name: str, layer: Any, p: Any, x: Any, inputs: Any) -> Any:
    try:
        return layer.forward(p, x, inputs)
    except KeyboardInterrupt:
        raise
    except Exception as exc:
        if isinstance(exc, (UserCodeError, TargetLoadError)):
            raise
        raise StackLayerError(name, "forward", exc) from exc


def _backward(name: str, layer: Any, p: Any, x: Any, inputs: Any, grad_y: Any) -> tuple[Any, Any]:
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
                             value=result)
    return result


class StackLayerError(Exception):
    """A layer's forward raised; its message names the layer (the engine adds 'forward raised')."""

    def __init__(self, name: str, what: str, exc: BaseException) -> None:
        super().__init__(f"in layer {name}: {summarise(exc)}")
        self.original = exc


# -- the whole network -----------------------------------------------------------------------

class ComposedForward:
    """The network's loss: each layer's forward applied in turn (picklable when layers are)."""

    def __init__(self, names: tuple[str, ...], layers: tuple[Any, ...]) -> None:
        self.names, self.layers = names, layers

    def activations(self, params: Mapping[str, Any], inputs: Mapping[str, Any]) -> list[Any]:
        """The input of every layer, then the loss."""
        acts = [inputs[INPUT]]
        for name, layer in zip(self.names, self.layers):
            acts.append(_forward(name, layer, params.get(name, {}), acts[-1], inputs))
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
            own, grad_x = _backward(names[k], layers[k], p, acts[k], inputs, grad_y)
            if names[k] in params or own:  # grads for a layer without params: unknown names
                grads[names[k]] = own
            if np.shape(grad_x) != np.shape(acts[k]):
                return grads
            grad_y = grad_x
        if _floating(inputs[INPUT]):
            grads[INPUT] = grad_y
        return grads


def _floating(value: Any) -> bool:
    return bool(np.issubdtype(np.asarray(value).dtype, np.floating))


def end_to_end(st: StackTarget) -> Target:
    """The whole stack as one flat target (forward and backward composed here)."""
    fwd = ComposedForward(st.names, st.layers)
    return Target(st.label, fwd, ComposedBackward(fwd), st.params, st.inputs, st.spec)


# -- each layer on its own ---------------------------------------------------------------------

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
        return _forward(self.name, self.layer, mine, x, inputs)


class LayerBackward:
    """One layer's backward for the engine's upstream gradient (1.0 for the loss layer)."""

    def __init__(self, forward: LayerForward) -> None:
        self.forward = forward

    def __call__(self, params: Mapping[str, Any], inputs: Mapping[str, Any],
                 grad_output: Any = 1.0) -> dict[str, Any]:
        f = self.forward
        mine, x = f.split(params)
        own, grad_x = _backward(f.name, f.layer, mine, x, inputs, grad_output)
        if not isinstance(own, Mapping):
            raise BadOutputError(
                f"layer {f.name}'s backward must return its grads as a mapping, not "
                f"{type(own).__name__}", value=own)
        out = dict(own)
        if _floating(x):
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
    from .tensors import Workspace

    params, inputs, _ = Workspace(st.params, st.inputs).scratch_trees()
    fwd = ComposedForward(st.names, st.layers)
    try:
        acts = fwd.activations(params, inputs)
    except StackLayerError as exc:
        raise UserCodeError(f"{exc} (in forward at the base point)") from exc.original
    out = []
    for k, act in enumerate(acts[:-1]):
        if isinstance(act, (tuple, list, dict, str, bytes)) or act is None:
            raise BadOutputError(
                f"layer {st.names[k - 1]}'s forward returned a {type(act).__name__}, not an array",
                value=act)
        out.append(np.array(act, copy=True))
    if np.size(acts[-1]) != 1:
        raise BadOutputError(
            f"the last layer, {st.names[-1]}, must return the scalar loss but returned shape "
            f"{np.shape(acts[-1])}", value=acts[-1])
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
        target = Target(f"{st.label}: layer {name} on its own", fwd, LayerBackward(fwd), params, st.inputs, spec)
        from .tensors import flatten

        checkable = any(_floating(v) for v in flatten(params).values())
        parts.append(LayerPart(name, target, f"{name}.{key}", checkable))
    return parts


def worker_functions(obj: Any, spec: str) -> tuple[Any, Any] | None:
    """forward and backward for a worker process, when ``obj`` (resolved from ``spec``) is a
    stack: the composed ones, or one layer's when ``spec`` names a layer; None otherwise."""
    part = spec.split(PART)[1:]
    if not is_stack(obj):
        return None
    names, layers = _named_layers(_get(obj, "layers"))
    if not part:
        fwd = ComposedForward(names, layers)
        return fwd, ComposedBackward(fwd)
    name, key = part
    lf = LayerForward(name, layers[names.index(name)], key)
    return lf, LayerBackward(lf)
