"""A vector-output layer: calibrating a bank of warehouse temperature sensors.

Eight raw sensor channels are mixed into three calibrated readings,
`out = gain * tanh(x @ W + b)`. forward returns the (batch, 3) array, so backward takes the
upstream gradient `grad_output` and returns the vector-Jacobian product; gradprobe draws
`grad_output` from a seeded standard normal.

    gradprobe check samples/sensor_mixer.py      # exit 0
"""

import numpy as np


def setup():
    rng = np.random.default_rng(11)
    params = {
        "mix": {"W": rng.normal(scale=0.4, size=(8, 3)), "b": rng.normal(scale=0.1, size=3)},
        "gain": rng.uniform(0.5, 2.0, size=3),
    }
    return params, {"raw": rng.normal(size=(16, 8))}


def forward(params, inputs):
    z = inputs["raw"] @ params["mix"]["W"] + params["mix"]["b"]
    return params["gain"] * np.tanh(z)


def backward(params, inputs, grad_output):
    z = inputs["raw"] @ params["mix"]["W"] + params["mix"]["b"]
    t = np.tanh(z)
    dz = grad_output * params["gain"] * (1.0 - t**2)
    return {
        "mix": {"W": inputs["raw"].T @ dz, "b": dz.sum(axis=0)},
        "gain": (grad_output * t).sum(axis=0),
        "raw": dz @ params["mix"]["W"].T,
    }
