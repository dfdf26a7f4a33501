"""Shop demand forecaster written as a stack of layers, each with its own backward.

Five standardised features per shop and week (price index, promotion, share of weekend days,
temperature, footfall) predict the demand of three product groups. The network is given as
layers (protocol section 5): gradprobe composes forward and backward itself, checks every
layer's backward on its own at the activation that reaches it, and checks the whole stack.

    hidden (dense 5->8) -> relu -> trend (dense 8->6 with tanh) -> forecast (dense 6->3) -> loss

    gradprobe check samples/shop_demand_stack.py     # exit 0; every layer agrees on its own
"""

import numpy as np

SHOPS, FEATURES = 10, 5


class Dense:
    """y = x @ W + b."""

    def __init__(self, name):
        self.name = name

    def forward(self, p, x, inputs):
        return x @ p["W"] + p["b"]

    def backward(self, p, x, inputs, grad_y):
        return {"W": x.T @ grad_y, "b": grad_y.sum(axis=0)}, grad_y @ p["W"].T


class Rectify:
    name = "relu"

    def forward(self, p, x, inputs):
        return np.maximum(x, 0.0)

    def backward(self, p, x, inputs, grad_y):
        return {}, grad_y * (x > 0)


class DenseTanh:
    """y = tanh(x @ W + b)."""

    def __init__(self, name):
        self.name = name

    def forward(self, p, x, inputs):
        return np.tanh(x @ p["W"] + p["b"])

    def backward(self, p, x, inputs, grad_y):
        y = np.tanh(x @ p["W"] + p["b"])
        dz = grad_y * (1.0 - y**2)
        return {"W": x.T @ dz, "b": dz.sum(axis=0)}, dz @ p["W"].T


class SquaredError:
    """Half the mean squared error against the recorded demand."""

    name = "loss"

    def forward(self, p, x, inputs):
        return 0.5 * np.mean((x - inputs["demand"]) ** 2)

    def backward(self, p, x, inputs, grad_y):
        return {}, grad_y * (x - inputs["demand"]) / x.size


layers = [Dense("hidden"), Rectify(), DenseTanh("trend"), Dense("forecast"), SquaredError()]


def setup():
    rng = np.random.default_rng(42)
    params = {
        "hidden": {"W": rng.normal(scale=0.6, size=(FEATURES, 8)), "b": rng.normal(scale=0.1, size=8)},
        "trend": {"W": rng.normal(scale=0.5, size=(8, 6)), "b": np.zeros(6)},
        "forecast": {"W": rng.normal(scale=0.5, size=(6, 3)), "b": np.full(3, 1.5)},
    }
    inputs = {
        "x": rng.normal(size=(SHOPS, FEATURES)),
        "demand": rng.gamma(4.0, 0.5, size=(SHOPS, 3)),  # thousands of units
    }
    return params, inputs
