"""JAX and array-api-strict targets for bench/memory_frameworks.py: the shop-demand network of
bench/torch_targets.py (50 store features -> tanh hidden layer -> 10 demand figures, squared
error), about MEMORY_PARAMS parameters, in float32 or float64.

JAX: forward only, its activation a ``custom_vjp`` rule with a hand-written backward (the
gradient is JAX's reverse mode through it). array-api-strict: forward and a hand-written
backward written with the array API namespace."""

from __future__ import annotations

import os

import numpy as np

BATCH = 8


def _hidden() -> int:
    size = int(os.environ.get("MEMORY_PARAMS", "4000000"))
    return max(8, int((size - 10) / 61))  # 50 inputs, hidden units, 10 outputs


def _arrays(dtype) -> tuple[dict, dict]:
    g = np.random.default_rng(0)
    h = _hidden()
    params = {"layer1": {"W": g.standard_normal((50, h)) / 50**0.5, "b": 0.1 * g.standard_normal(h)},
              "layer2": {"W": g.standard_normal((h, 10)) / h**0.5, "b": 0.1 * g.standard_normal(10)}}
    inputs = {"x": g.standard_normal((BATCH, 50)), "demand": g.standard_normal((BATCH, 10))}
    cast = lambda t: {k: cast(v) if isinstance(v, dict) else v.astype(dtype) for k, v in t.items()}  # noqa: E731
    return cast(params), cast(inputs)


class JaxDemand:
    def __init__(self, dtype) -> None:
        self.dtype = dtype

    def setup(self):
        import jax
        import jax.numpy as jnp

        params, inputs = _arrays(self.dtype)
        to = lambda t: {k: to(v) if isinstance(v, dict) else jnp.asarray(v) for k, v in t.items()}  # noqa: E731
        with jax.enable_x64(self.dtype == np.float64):
            return to(params), to(inputs)

    def forward(self, params, inputs):
        import jax
        import jax.numpy as jnp

        @jax.custom_vjp
        def squash(z):
            return jnp.tanh(z)

        def fwd(z):
            t = jnp.tanh(z)
            return t, t

        def bwd(t, g):
            return (g * (1 - t * t),)

        squash.defvjp(fwd, bwd)
        a = squash(inputs["x"] @ params["layer1"]["W"] + params["layer1"]["b"])
        out = a @ params["layer2"]["W"] + params["layer2"]["b"]
        return 0.5 * jnp.sum((out - inputs["demand"]) ** 2) / BATCH


class StrictDemand:
    def __init__(self, dtype) -> None:
        self.dtype = dtype

    def setup(self):
        import array_api_strict as xp

        params, inputs = _arrays(self.dtype)
        to = lambda t: {k: to(v) if isinstance(v, dict) else xp.asarray(v) for k, v in t.items()}  # noqa: E731
        return to(params), to(inputs)

    def forward(self, params, inputs):
        import array_api_strict as xp

        a = xp.tanh(inputs["x"] @ params["layer1"]["W"] + params["layer1"]["b"])
        out = a @ params["layer2"]["W"] + params["layer2"]["b"]
        return 0.5 * xp.sum((out - inputs["demand"]) ** 2) / BATCH

    def backward(self, params, inputs):
        import array_api_strict as xp

        a = xp.tanh(inputs["x"] @ params["layer1"]["W"] + params["layer1"]["b"])
        out = a @ params["layer2"]["W"] + params["layer2"]["b"]
        d = (out - inputs["demand"]) / BATCH
        d1 = (d @ params["layer2"]["W"].T) * (1 - a * a)
        return {"layer2": {"W": a.T @ d, "b": xp.sum(d, axis=0)},
                "layer1": {"W": inputs["x"].T @ d1, "b": xp.sum(d1, axis=0)}}


def jax32_4m():
    return JaxDemand(np.float32)


def jax64_4m():
    return JaxDemand(np.float64)


def strict32_4m():
    return StrictDemand(np.float32)


def strict64_4m():
    return StrictDemand(np.float64)
