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
                def scalar(t, name=name, idx=idx):
                    params = dict(base)
                    params[name] = base[name].copy()
                    params[name][idx] = t
                    out = forward_mp(net, params, net.inputs)
                    return out if weights is None else np.sum(np.asarray(out, dtype=object) * weights)
                grad[idx] = float(mpmath.diff(scalar, base[name][idx]))
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
