"""Crop yield from field sensors: a small ReLU network trained with absolute error.

Four standardised readings per field plot (soil moisture, soil temperature, last week's
rainfall, nitrogen applied) predict the plot's yield anomaly: its yield minus the regional
mean, in tonnes per hectare. Both the activation
(ReLU) and the loss (mean absolute error) have kinks, and plot 0 is a sensor dropout: all its
readings are 0 and its recorded yield equals the output bias, so that plot sits exactly on
the ReLU kink of every hidden unit and on the kink of |error|. gradprobe reports the
affected tensors as `kink`, not as failures.

    gradprobe check samples/crop_yield.py        # exit 0, kinks on hidden.b, out.b and x
"""

import numpy as np

PLOTS, READINGS, HIDDEN = 12, 4, 6


def setup():
    rng = np.random.default_rng(2024)
    x = rng.normal(size=(PLOTS, READINGS))
    x[0] = 0.0  # sensor dropout on plot 0
    params = {
        "hidden": {"W": rng.normal(scale=0.7, size=(READINGS, HIDDEN)), "b": np.zeros(HIDDEN)},
        "out": {"W": rng.normal(scale=0.7, size=(HIDDEN, 1)), "b": np.array([0.25])},
    }
    anomaly = rng.normal(scale=0.8, size=(PLOTS, 1))
    anomaly[0, 0] = 0.25  # equals the output bias: plot 0's error is exactly 0
    return params, {"x": x, "y": anomaly}


def _layers(params, inputs):
    pre = inputs["x"] @ params["hidden"]["W"] + params["hidden"]["b"]
    h = np.maximum(pre, 0.0)
    pred = h @ params["out"]["W"] + params["out"]["b"]
    return pre, h, pred


def forward(params, inputs):
    _, _, pred = _layers(params, inputs)
    return np.mean(np.abs(pred - inputs["y"]))


def backward(params, inputs):
    pre, h, pred = _layers(params, inputs)
    dpred = np.sign(pred - inputs["y"]) / pred.size  # sign(0) = 0: a valid subgradient
    dh = dpred @ params["out"]["W"].T
    dpre = dh * (pre > 0)  # ReLU'(0) taken as 0, also a valid subgradient
    return {
        "hidden": {"W": inputs["x"].T @ dpre, "b": dpre.sum(axis=0)},
        "out": {"W": h.T @ dpred, "b": dpred.sum(axis=0)},
        "x": dpre @ params["hidden"]["W"].T,
    }
