"""Targets from stateful layer objects, without changes to the user's class.

The common object style: ``layer.forward(x)`` returns the output and caches what backward
needs; ``layer.backward(dout)`` returns the input gradient and stores each parameter's
gradient on the layer (``layer.dW`` for ``layer.W``). :func:`layer_target` wraps such a layer:
each call puts gradprobe's (private, read-only) copies of the parameters on the layer, runs
it, and puts the layer's own arrays back afterwards, so the layer is unchanged by a check.
"""

from __future__ import annotations

from contextlib import contextmanager
from typing import Any, Iterator, Mapping

import numpy as np

from .errors import TargetLoadError
from .target import Target

_MISSING = object()


@contextmanager
def _installed(layer: Any, values: Mapping[str, Any]) -> Iterator[None]:
    saved = {name: getattr(layer, name, _MISSING) for name in values}
    try:
        for name, value in values.items():
            setattr(layer, name, value)
        yield
    finally:
        for name, value in saved.items():
            if value is _MISSING:
                delattr(layer, name)
            else:
                setattr(layer, name, value)


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

    ``grads`` maps each parameter attribute to the attribute where ``layer.backward`` stores
    its gradient, e.g. ``{"W": "dW", "b": "db"}``. The check is of ``sum(g * layer.forward(x))``
    with gradprobe's seeded ``g``; ``layer.backward(g)`` must return the gradient of ``x``.
    The parameters are reported in the layer ``name`` (default: the class name).
    """
    name = name or type(layer).__name__
    for method in ("forward", "backward"):
        if not callable(getattr(layer, method, None)):
            raise TargetLoadError(f"the layer {type(layer).__name__} has no {method} method")
    missing = [attr for attr in grads if not hasattr(layer, attr)]
    if missing:
        raise TargetLoadError(f"the layer {type(layer).__name__} has no attribute {missing[0]!r}")
    params = {name: {attr: np.array(getattr(layer, attr), copy=True) for attr in grads}}
    inputs = {input_name: np.array(x, copy=True)}

    def forward(p: Mapping[str, Any], i: Mapping[str, Any]) -> Any:
        with _installed(layer, p[name]):
            return layer.forward(i[input_name])

    def backward(p: Mapping[str, Any], i: Mapping[str, Any], grad_output: np.ndarray) -> dict:
        blank = {g: None for g in grads.values() if not hasattr(layer, g)}
        with _installed(layer, {**p[name], **blank}):
            layer.forward(i[input_name])  # refresh the caches for these params
            dx = layer.backward(grad_output)
            stored = {attr: _stored(layer, attr, g) for attr, g in grads.items()}
        return {name: stored, input_name: dx}

    return Target(label or f"{name} layer", forward, backward, params, inputs)


def _stored(layer: Any, attr: str, attribute: str) -> Any:
    value = getattr(layer, attribute, None)
    if value is None:
        raise TargetLoadError(f"backward stored no gradient in layer.{attribute} for {attr}")
    return np.array(value, copy=True)
