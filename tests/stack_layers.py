"""Small protocol-style stack layers for the stack tests, with switchable slips.

``slip="input"`` scales the input gradient by 3, ``slip="param"`` flips the sign of the weight
gradient; the data (shop demand, store sensors) are invented for the tests.
"""

from __future__ import annotations

import numpy as np


class Dense:
    def __init__(self, name, slip=None):
        self.name, self.slip = name, slip

    def forward(self, p, x, inputs):
        return x @ p["W"] + p["b"]

    def backward(self, p, x, inputs, g):
        gW, gx = x.T @ g, g @ p["W"].T
        if self.slip == "param":
            gW = -gW
        if self.slip == "input":
            gx = 3.0 * gx
        return {"W": gW, "b": g.sum(axis=0)}, gx


class Rectify:
    def __init__(self, name="relu"):
        self.name = name

    def forward(self, p, x, inputs):
        return np.maximum(x, 0.0)

    def backward(self, p, x, inputs, g):
        return {}, g * (x > 0)


class Tanh:
    def __init__(self, name="tanh"):
        self.name = name

    def forward(self, p, x, inputs):
        return np.tanh(x)

    def backward(self, p, x, inputs, g):
        return {}, g * (1.0 - np.tanh(x) ** 2)


class SquaredLoss:
    name = "loss"

    def forward(self, p, x, inputs):
        return 0.5 * float(np.sum((x - inputs["y"]) ** 2))

    def backward(self, p, x, inputs, g):
        return {}, g * (x - inputs["y"])


class ChoiceLoss:
    """Mean cross-entropy of the scores against integer class labels."""

    name = "loss"

    def forward(self, p, x, inputs):
        z = x - x.max(axis=1, keepdims=True)
        logp = z - np.log(np.exp(z).sum(axis=1, keepdims=True))
        return -float(np.mean(logp[np.arange(len(x)), inputs["labels"]]))

    def backward(self, p, x, inputs, g):
        z = np.exp(x - x.max(axis=1, keepdims=True))
        prob = z / z.sum(axis=1, keepdims=True)
        prob[np.arange(len(x)), inputs["labels"]] -= 1.0
        return {}, g * prob / len(x)


def arrays(widths=(3, 4, 2), batch=5, seed=0, names=("d1", "d2")):
    """Params for dense layers ``names`` of the given widths, and x, y."""
    rng = np.random.default_rng(seed)
    params = {n: {"W": rng.normal(size=(a, b)), "b": rng.normal(scale=0.5, size=b)}
              for n, a, b in zip(names, widths[:-1], widths[1:])}
    return params, {"x": rng.normal(size=(batch, widths[0])), "y": rng.normal(size=(batch, widths[-1]))}
