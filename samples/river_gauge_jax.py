"""River gauge readings through a JAX custom_vjp rule, in bfloat16.

A gauge reports the level above its zero mark, never below: a smooth floor softplus(z) =
log(1 + e^z) of a linear model of upstream rainfall. The floor is a custom_vjp with a
hand-written backward (the derivative of softplus is the sigmoid). The arrays are bfloat16:
gradprobe checks the rule on its float64 run and judges the bfloat16 gradient against that
with bfloat16's rounding, which a correct rule stays within.

    gradprobe check samples/river_gauge_jax.py  # exit 0
"""

import jax
import jax.numpy as jnp
import numpy as np


@jax.custom_vjp
def floor(z):
    return jnp.logaddexp(z, 0.0)


def _floor_fwd(z):
    return floor(z), z


def _floor_bwd(z, grad):
    return (grad * jax.nn.sigmoid(z),)


floor.defvjp(_floor_fwd, _floor_bwd)


def setup():
    rng = np.random.default_rng(8)
    rain = rng.gamma(2.0, 1.5, size=(8, 3))  # 8 days, 3 upstream stations, mm
    level = rng.normal(1.0, 0.3, size=(8,))
    params = {"response": jnp.asarray(rng.normal(0.2, 0.1, size=(3,)), dtype=jnp.bfloat16),
              "base": jnp.asarray(-0.5, dtype=jnp.bfloat16)}
    return params, {"rain": jnp.asarray(rain, dtype=jnp.bfloat16), "level": jnp.asarray(level, dtype=jnp.bfloat16)}


def forward(params, inputs):
    predicted = floor(inputs["rain"] @ params["response"] + params["base"])
    return jnp.mean((predicted - inputs["level"]) ** 2)
