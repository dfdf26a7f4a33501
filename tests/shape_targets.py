"""Targets of every shape and memory layout for the shape fuzz (tests/test_shape_fuzz.py).

One module source per (shape, layout, variant, dtype): a nested param ``m.w`` of the fuzzed
shape and layout, and a 0-d param ``t`` (a temperature), with the loss

    sum(c * tanh(w * t)) + t**2 / 2   (+ sum(|w - k|) for a kinked target),

whose derivatives are d/dw = c t (1 - tanh(w t)^2) (+ sign(w - k)) and d/dt = sum(c w (1 -
tanh(w t)^2)) + t (tanh' = 1 - tanh^2: Abramowitz & Stegun 4.5.79 via 4.5.17; the chain and
sum rules). Variants:

- ``correct``; ``kinked`` (one element of w sits exactly at |w - k|'s kink: the second look);
- ``factor``: d/dw 1.5 times too large; ``scalar``: d/dt 1.5 times too large (the 0-d crash
  class); ``element``: one element of d/dw 20% off (localisation); ``flat``: the loss scaled by
  1e-9 and d/dt 1.5 times too large (a near-flat buggy target: the fuzz measure runs).
"""

from __future__ import annotations

import math

import numpy as np

VARIANTS = ("correct", "kinked", "factor", "scalar", "element", "flat")
BUGGY = {"factor": "m.w", "scalar": "t", "element": "m.w", "flat": "t"}

_SOURCE = '''
import numpy as np

SHAPE, LAYOUT, VARIANT, DTYPE = {shape!r}, {layout!r}, {variant!r}, np.{dtype}
SCALE = 1e-9 if VARIANT == "flat" else 1.0


def _layout(a):
    if LAYOUT == "fortran":
        return np.asfortranarray(a)
    if LAYOUT == "strided":
        base = np.zeros(a.shape[:-1] + (2 * a.shape[-1],), a.dtype)
        base[..., ::2] = a
        return base[..., ::2]
    if LAYOUT == "reversed":
        return np.ascontiguousarray(a[::-1])[::-1]
    if LAYOUT == "broadcast":
        return np.broadcast_to(a[:1], a.shape)
    return a


def setup():
    rng = np.random.default_rng(3)
    w = (0.5 + rng.random(SHAPE)).astype(DTYPE)
    if LAYOUT == "broadcast":
        w = np.broadcast_to(w[:1], w.shape).copy()
    inputs = {{"c": rng.uniform(-1, 1, SHAPE).astype(DTYPE)}}
    if VARIANT == "kinked":
        k = (w - 0.25).astype(DTYPE)
        if w.size:
            k.reshape(-1)[0] = w.reshape(-1)[0]
        inputs["k"] = k
    return {{"t": np.asarray(0.7, DTYPE), "m": {{"w": _layout(w)}}}}, inputs


def forward(params, inputs):
    t, w, c = params["t"], params["m"]["w"], inputs["c"]
    loss = np.sum(c * np.tanh(w * t)) + t * t / 2
    if VARIANT == "kinked":
        loss = loss + np.sum(np.abs(w - inputs["k"]))
    return SCALE * loss


def backward(params, inputs):
    t, w, c = params["t"], params["m"]["w"], inputs["c"]
    s = 1 - np.tanh(w * t) ** 2
    gw = SCALE * c * t * s
    gt = SCALE * (np.sum(c * w * s) + t)
    if VARIANT == "kinked":
        gw = gw + SCALE * np.sign(w - inputs["k"])
    if VARIANT == "factor":
        gw = 1.5 * gw
    if VARIANT in ("scalar", "flat"):
        gt = 1.5 * gt
    if VARIANT == "element" and gw.size:
        gw = np.array(gw, order="C")
        gw.reshape(-1)[gw.size // 2] *= 1.2
    return {{"t": gt, "m": {{"w": gw}}}}
'''


def source(shape: tuple, layout: str, variant: str, dtype: str = "float64") -> str:
    return _SOURCE.format(shape=tuple(shape), layout=layout, variant=variant, dtype=dtype)


def load(shape: tuple, layout: str, variant: str, dtype: str = "float64") -> dict:
    ns: dict = {"__name__": f"shape_target_{variant}"}
    exec(compile(source(shape, layout, variant, dtype), "<shape target>", "exec"), ns)
    return ns


def element_index(shape: tuple) -> tuple[int, ...]:
    """The element the ``element`` variant gets wrong."""
    size = math.prod(shape)
    return tuple(int(i) for i in np.unravel_index(size // 2, shape))
