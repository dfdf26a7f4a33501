"""The river gauges of river_gauge_jax.py with the floor's rule taking the sigmoid of -z (the
derivative of softplus(-z), a sign slip), so every gradient through it is wrong.

    gradprobe check samples/river_gauge_jax_buggy.py  # exit 1
"""

import jax
import jax.numpy as jnp
from river_gauge_jax import setup  # noqa: F401  (the same arrays)


@jax.custom_vjp
def floor(z):
    return jnp.logaddexp(z, 0.0)


floor.defvjp(lambda z: (floor(z), z), lambda z, grad: (grad * jax.nn.sigmoid(-z),))  # bug: -z


def forward(params, inputs):
    predicted = floor(inputs["rain"] @ params["response"] + params["base"])
    return jnp.mean((predicted - inputs["level"]) ** 2)
