"""The crop-yield network of crop_yield.py with a bug in its backward pass.

The output layer's weight gradient is built from the cached pre-activations instead of the
ReLU outputs: an easy slip when a layer caches both. Only `out.W` is wrong.

    gradprobe check samples/crop_yield_buggy.py  # exit 1, names out.W
"""

import numpy as np
from crop_yield import _layers, forward, setup  # noqa: F401  (setup and forward are reused)


def backward(params, inputs):
    pre, h, pred = _layers(params, inputs)
    dpred = np.sign(pred - inputs["y"]) / pred.size
    dh = dpred @ params["out"]["W"].T
    dpre = dh * (pre > 0)
    return {
        "hidden": {"W": inputs["x"].T @ dpre, "b": dpre.sum(axis=0)},
        "out": {"W": pre.T @ dpred, "b": dpred.sum(axis=0)},  # bug: pre where h belongs
        "x": dpre @ params["hidden"]["W"].T,
    }
