"""Daily bread orders of a bakery as a Poisson regression, written against the array API
standard (array-api-strict: only what the standard allows), with a hand-written backward.

The orders of each day are Poisson with rate exp(x . w); the loss is the negative
log-likelihood without its constant, sum(exp(x w) - y (x w)), and its gradient is
x^T (exp(x w) - y). forward and backward receive array-api-strict arrays.

    gradprobe check samples/bakery_orders_array_api.py  # exit 0
"""

import array_api_strict as xp
import numpy as np


def setup():
    rng = np.random.default_rng(12)
    features = rng.normal(0.0, 0.5, size=(10, 3))  # weekday, temperature, holiday signals
    orders = rng.poisson(5.0, size=(10,)).astype(np.float64)
    return {"w": xp.asarray([1.5, 0.2, -0.1])}, {"x": xp.asarray(features), "y": xp.asarray(orders)}


def forward(params, inputs):
    eta = inputs["x"] @ params["w"]
    return xp.sum(xp.exp(eta) - inputs["y"] * eta)


def backward(params, inputs):
    eta = inputs["x"] @ params["w"]
    return {"w": xp.matrix_transpose(inputs["x"]) @ (xp.exp(eta) - inputs["y"])}
