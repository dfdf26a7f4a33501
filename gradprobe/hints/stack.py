"""Flat targets whose failures are exactly the layers before some layer.

When one layer passes back a wrong input gradient, every layer before it (in the order the
params are given, input side first) receives a wrong upstream gradient: all their tensors fail
and none of that layer's or later ones do. That pattern points at the layer boundary.
"""

from __future__ import annotations

from ..common.tensors import layer_of
from .evidence import Context, Evidence, count


def _layers(param_names: tuple[str, ...]) -> list[list[str]]:
    order: dict[str, list[str]] = {}
    for name in param_names:
        order.setdefault(layer_of(name), []).append(name)
    return list(order.values())


def boundary(evidence: list[Evidence], ctx: Context) -> tuple[int, list[str]] | None:
    """(how many layers come before the boundary, the layers' names) when the failing tensors
    are exactly all tensors of the layers before one layer, at least two of them failing."""
    by_name = {e.name: e for e in evidence}
    if not ctx.param_names or any(p not in by_name for p in ctx.param_names):
        return None  # a param with no measured values (missing gradient...): pattern unknown
    layers = _layers(ctx.param_names)
    fails = [[by_name[p].fails for p in layer] for layer in layers]
    inputs = [e for e in evidence if e.name not in ctx.param_names]
    for i in range(1, len(layers)):
        before = [f for layer in fails[:i] for f in layer]
        after = [f for layer in fails[i:] for f in layer]
        if all(before) and not any(after) and len(before) >= 2:
            if all(e.fails for e in inputs):  # inputs come before every layer
                return i, [layer_of(layer[0]) for layer in layers]
            return None
    return None


def stack_hint(i: int, names: list[str]) -> str:
    layer, previous = names[i], names[i - 1]
    failing = f"layer {previous}" if i == 1 else f"the {count(i, 'layer')} before {layer}"
    return (f"every tensor of {failing} fails and none from {layer} on does: the gradient "
            f"{layer} passes back (its input gradient, or the derivative of an activation "
            f"between {previous} and {layer}) is the likely cause; checking the model as a "
            "layer stack would localise it")
