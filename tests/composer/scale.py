"""What a finite-difference check can resolve at all, and networks that overflow.

A gradient entry ``g_i`` moves the checked scalar ``f`` by about ``g_i * x_i`` when its param
``x_i`` moves by its own size. When that is below 1e-10 of the scale on which ``f`` is rounded
(``|f|`` for a loss; ``sum |grad_output * out|`` for an array output), no step of a float64
difference sees it against rounding with a margin (1e-16 rounding, a 1e-3 relative step:
1e-13, a thousand rounding units; our own bar, not a convention). Such a gradient is *faint*:
a correct target all of whose gradients are faint may end ``inconclusive``, and a bug whose
error is faint need not fail. For ``x_i`` at or near 0 the tensor's rms is used instead.
"""

from __future__ import annotations

import numpy as np

from .backend import NUMPY
from .graph import Net, evaluate

FAINT = 1e-10
# A verdict at gradprobe's float64 threshold (1e-6) needs the numeric value to 1e-7: with
# rounding 8 eps F per value and the largest step a smooth loss allows about 5% of x, that
# is |g x| / F >= 8 eps / (0.05 * 1e-7) ~ 3.6e-7 (our own estimate). Below UNDECIDABLE a
# correct tensor may honestly end ``inconclusive``.
UNDECIDABLE = 3.6e-7


def rounding_scale(net: Net, grad_output) -> float:
    out = np.asarray(net.forward(net.params, net.inputs), dtype=np.float64)
    return float(np.abs(out).sum() if grad_output is None else np.abs(grad_output * out).sum())


def sensitivity(net: Net, values: dict[str, np.ndarray], grad_output) -> dict[str, float]:
    """Per tensor: max_i |values_i| * max(|x_i|, rms(x)) relative to the rounding scale."""
    scale = rounding_scale(net, grad_output) or np.finfo(np.float64).tiny
    result = {}
    for name, v in values.items():
        x = np.abs(np.asarray(net.params[name], dtype=np.float64))
        size = np.maximum(x, np.sqrt(np.mean(x * x)))
        result[name] = float(np.max(np.abs(np.asarray(v, dtype=np.float64)) * size)) / scale
    return result


def sane(net: Net, grad_output=None) -> bool:
    """Every intermediate value and gradient finite and below 1e-6 of the dtype's largest
    number (room for perturbed forwards)."""
    limit = 1e-6 * float(np.finfo(net.dtype).max)
    with np.errstate(all="ignore"):
        values = evaluate(net, NUMPY, net.params, net.inputs)
        grads = net.backward(net.params, net.inputs, grad_output)
    arrays = [np.asarray(v) for v in values.values() if np.asarray(v).dtype.kind == "f"]
    arrays += list(grads.values())
    return all(bool(np.all(np.isfinite(a)) and np.all(np.abs(a) < limit)) for a in arrays)
