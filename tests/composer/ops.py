"""The ops: each has a forward, written once against a backend, and a vector-Jacobian product.

``forward(xp, *args, **attrs)`` uses only the backend namespace (numpy or mpmath, see
:mod:`composer.backend`). ``vjp(g, out, args, attrs, wrong)`` returns one upstream gradient per
argument (None for integer arguments such as labels); it always runs in numpy. ``wrong=True``
selects a planted wrong derivative where the op has one (``WRONG_DERIVATIVE``): each is wrong
on smooth coordinates too, so a check that stays away from kinks can see it.

Derivatives at kinks follow the usual one-sided conventions (common practice): ReLU'(0) = 0,
leaky ReLU'(0) = alpha, |x|'(0) = sign(0) = 0, clip' = 0 at either bound, an elementwise max
tie and a max over an axis tie both go to the first argument. Each is a valid subgradient.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Op:
    forward: Callable[..., Any]
    vjp: Callable[..., tuple]


def _expand(g, shape, axis):
    """Broadcast the gradient of a reduction over ``axis`` back to the input's ``shape``."""
    g = np.asarray(g)
    if axis is not None:
        g = np.expand_dims(g, axis)
    return np.broadcast_to(g, shape).copy()


def _count(shape, axis):
    return int(np.prod(shape)) if axis is None else shape[axis]


def _softmax_np(a):
    e = np.exp(a - np.max(a, axis=-1, keepdims=True))
    return e / np.sum(e, axis=-1, keepdims=True)


def _softmax(xp, a):
    m = xp.amax(a, axis=-1)[..., None]
    e = xp.exp(a - m)
    return e / np.sum(e, axis=-1, keepdims=True)


def _xent(xp, logits, labels):
    m = xp.amax(logits, axis=-1)
    lse = m + xp.log(np.sum(xp.exp(logits - m[..., None]), axis=-1))
    return lse - logits[np.arange(logits.shape[0]), labels]


def _xent_vjp(g, out, args, attrs, wrong):
    """softmax - onehot; at the label ``p - 1`` is written as minus the other entries' sum, so
    a confident prediction (p = 1 to rounding) keeps its small gradient."""
    logits, labels = args
    rows = np.arange(logits.shape[0])
    d = _softmax_np(logits)
    onehot = np.zeros(d.shape, dtype=bool)
    onehot[rows, labels] = True
    d[rows, labels] = -np.sum(np.where(onehot, 0, d), axis=-1)
    return d * np.asarray(g)[:, None], None


def _maxax_vjp(g, out, args, attrs, wrong):
    (a,) = args
    axis = attrs["axis"]
    first = np.expand_dims(np.argmax(a, axis=axis), axis)  # ties: the first maximum
    mask = np.zeros(a.shape, dtype=a.dtype)
    np.put_along_axis(mask, first, 1, axis=axis)
    return (mask * np.expand_dims(g, axis),)


def _relu_vjp(g, out, args, attrs, wrong):
    (a,) = args
    mask = out >= 0 if wrong else a > 0  # wrong: "output >= 0" is true everywhere
    return (g * mask,)


def _leaky_vjp(g, out, args, attrs, wrong):
    (a,) = args
    alpha = attrs["alpha"]
    slope = np.where(a > 0, alpha, 1.0) if wrong else np.where(a > 0, 1.0, alpha)
    return (g * slope.astype(a.dtype),)


def _abs_vjp(g, out, args, attrs, wrong):
    (a,) = args
    return (g * (np.ones_like(a) if wrong else np.sign(a)),)


def _tanh_vjp(g, out, args, attrs, wrong):
    """tanh' = 1 - y^2, computed as 1/cosh(a)^2 from the argument: no cancellation where the
    output is 1 to rounding (the planted wrong one is 1 - y)."""
    if wrong:
        return (g * (1 - out),)
    with np.errstate(over="ignore"):
        return (g / np.cosh(args[0]) ** 2,)


def _sigmoid(a):
    """1 / (1 + exp(-a)) as exp(-softplus(-a)): accurate for large negative a too."""
    return np.exp(-np.logaddexp(np.zeros((), dtype=np.result_type(a)), -a))


def _softplus_vjp(g, out, args, attrs, wrong):
    (a,) = args
    return (g * (_sigmoid(2 * a) if wrong else _sigmoid(a)),)


def _clip_vjp(g, out, args, attrs, wrong):
    (a,) = args
    return (g * ((a > attrs["lo"]) & (a < attrs["hi"])),)


def _max2_vjp(g, out, args, attrs, wrong):
    a, b = args
    first = a >= b  # ties go to the first argument
    return g * first, g * ~first


def _softmax_vjp(g, out, args, attrs, wrong):
    """``y_i (g_i - sum_j y_j g_j)`` written as ``y_i sum_j y_j (g_i - g_j)``: the same value
    without the cancellation that a saturated softmax (some y_i = 1 to rounding) causes."""
    spread = g[..., :, None] - g[..., None, :]
    return (out * np.sum(spread * out[..., None, :], axis=-1),)


def _huber(xp, a, delta):
    small = 0.5 * a * a
    large = delta * (xp.abs(a) - 0.5 * delta)
    return np.where(np.asarray(xp.abs(a)) <= delta, small, large)


OPS: dict[str, Op] = {
    "matmul": Op(lambda xp, a, w: a @ w, lambda g, o, args, at, wr: (g @ args[1].T, args[0].T @ g)),
    "add_bias": Op(lambda xp, a, b: a + b, lambda g, o, args, at, wr: (g, g.sum(axis=0))),
    "scale": Op(lambda xp, a, s: a * s, lambda g, o, args, at, wr: (g * args[1], (g * args[0]).sum(axis=0))),
    "add": Op(lambda xp, a, b: a + b, lambda g, o, args, at, wr: (g, g)),
    "sub": Op(lambda xp, a, b: a - b, lambda g, o, args, at, wr: (g, -g)),
    "mul": Op(lambda xp, a, b: a * b, lambda g, o, args, at, wr: (g * args[1], g * args[0])),
    "cmul": Op(lambda xp, a, c: a * c, lambda g, o, args, at, wr: (g * at["c"],)),
    "square": Op(lambda xp, a: a * a, lambda g, o, args, at, wr: (2 * args[0] * g,)),
    "relu": Op(lambda xp, a: xp.maximum(a, 0.0), _relu_vjp),
    "leaky": Op(lambda xp, a, alpha: xp.maximum(a, 0.0) + alpha * xp.minimum(a, 0.0), _leaky_vjp),
    "abs": Op(lambda xp, a: xp.abs(a), _abs_vjp),
    "tanh": Op(lambda xp, a: xp.tanh(a), _tanh_vjp),
    "softplus": Op(lambda xp, a: xp.softplus(a), _softplus_vjp),
    "clip": Op(lambda xp, a, lo, hi: xp.minimum(xp.maximum(a, lo), hi), _clip_vjp),
    "max2": Op(lambda xp, a, b: xp.maximum(a, b), _max2_vjp),
    "maxax": Op(lambda xp, a, axis: xp.amax(a, axis), _maxax_vjp),
    "softmax": Op(_softmax, _softmax_vjp),
    "sum": Op(lambda xp, a, axis: np.sum(a, axis=axis),
              lambda g, o, args, at, wr: (_expand(g, np.shape(args[0]), at["axis"]),)),
    "mean": Op(lambda xp, a, axis: np.sum(a, axis=axis) * (1.0 / _count(np.shape(a), axis)),
               lambda g, o, args, at, wr: (_expand(g, np.shape(args[0]), at["axis"])
                                           * (1.0 / _count(np.shape(args[0]), at["axis"])),)),
    "huber": Op(_huber, lambda g, o, args, at, wr: (g * np.clip(args[0], -at["delta"], at["delta"]),)),
    "xent": Op(_xent, _xent_vjp),
}

# Activations whose planted wrong derivative differs from the right one on smooth coordinates.
WRONG_DERIVATIVE = ("relu", "leaky", "abs", "tanh", "softplus")
KINKED = ("relu", "leaky", "abs", "clip")
