"""The independent reference: every param coordinate's derivative of the mpmath forward.

The same op forwards run over mpmath numbers at 40 significant digits (``mp.dps = 40``) and
``mpmath.diff`` differentiates the scalar (for an array output, ``sum(grad_output * out)``) along
each coordinate. mpmath.diff's default step is a few tens of digits below the working precision,
so at points whose pre-activations are far from a kink (relative to 1e-20) it sees a smooth
function; the result is good to far more digits than float64 has. No VJP is involved.
"""

from __future__ import annotations

import mpmath
import numpy as np

from .backend import to_mp
from .graph import Net, forward_mp


def reference_gradient(net: Net, grad_output: np.ndarray | None = None, dps: int = 40) -> dict[str, np.ndarray]:
    """The gradient of the loss (or of ``sum(grad_output * out)``) w.r.t. each param, as floats."""
    with mpmath.workdps(dps):
        base = {k: to_mp(v) for k, v in net.params.items()}
        weights = None if grad_output is None else to_mp(grad_output)
        result = {}
        for name, value in net.params.items():
            grad = np.zeros(value.shape)
            for idx in np.ndindex(value.shape):
                grad[idx] = float(mpmath.diff(
                    lambda t, name=name, idx=idx: _along(net, base, weights, name, idx, t),
                    base[name][idx]))
            result[name] = grad
    return result


def nearest_kink(net: Net) -> float:
    """The smallest distance of a kinked op's argument from its kink, at 40 digits, relative to
    that argument's scale: how far the point is from a kink. Ops: relu, leaky, abs (at 0),
    clip (at its bounds), max2 and maxax (ties), Huber (at +-delta, a corner)."""
    from .backend import MPMATH
    from .graph import evaluate

    with mpmath.workdps(40):
        params = {k: to_mp(v) for k, v in net.params.items()}
        inputs = {k: (to_mp(v) if np.issubdtype(np.asarray(v).dtype, np.floating) else v)
                  for k, v in net.inputs.items()}
        values = evaluate(net, MPMATH, params, inputs)
        gaps = [np.inf]
        for n in net.nodes:
            args = [np.asarray(values[a], dtype=object) for a in n.args]
            attrs = dict(n.attrs)
            if n.op in ("relu", "leaky", "abs"):
                gaps.append(_gap(args[0]))
            elif n.op == "clip":
                gaps.append(min(_gap(args[0] - attrs["lo"]), _gap(args[0] - attrs["hi"])))
            elif n.op == "max2":
                gaps.append(_gap(args[0] - args[1]))
            elif n.op == "maxax":
                srt = np.sort(np.asarray(args[0], dtype=float), axis=attrs["axis"])
                gaps.append(float(np.min(np.abs(np.diff(srt, axis=attrs["axis"])[..., -1:]))))
            elif n.op == "huber":
                gaps.append(min(_gap(args[0] - attrs["delta"]), _gap(args[0] + attrs["delta"])))
    return float(min(gaps))


def _gap(a: np.ndarray) -> float:
    return float(min(abs(v) for v in a.ravel())) if a.size else np.inf


def kinked_tensors(net: Net, grad_output: np.ndarray | None = None) -> set[str]:
    """The params with a coordinate whose one-sided difference quotients differ: step 1e-25 at
    60 digits, so rounding stays below 1e-30 of the function's value and curvature contributes
    about 1e-25 of the slope; the bar is 1e-12 of the slopes plus 1e-28 of the value."""
    with mpmath.workdps(60):
        base = {k: to_mp(v) for k, v in net.params.items()}
        weights = None if grad_output is None else to_mp(grad_output)
        h = mpmath.mpf("1e-25")
        kinked = set()
        for name, value in base.items():
            for idx in np.ndindex(value.shape):
                x0 = value[idx]
                f = [_along(net, base, weights, name, idx, x0 + k * h) for k in (-1, 0, 1)]
                right, left = (f[2] - f[1]) / h, (f[1] - f[0]) / h
                if abs(right - left) > mpmath.mpf("1e-12") * (abs(right) + abs(left)) + mpmath.mpf("1e-28") * abs(f[1]):
                    kinked.add(name)
    return kinked


def _along(net: Net, base: dict, weights, name: str, idx: tuple, t) -> mpmath.mpf:
    params = dict(base)
    params[name] = base[name].copy()
    params[name][idx] = t
    out = forward_mp(net, params, net.inputs)
    return out if weights is None else np.sum(np.asarray(out, dtype=object) * weights)
