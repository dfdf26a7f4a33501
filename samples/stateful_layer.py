"""A layer in the object style, checked without changing its class.

`PriceResponse` turns store features into a predicted demand response, softplus(x @ W + b).
Like most hand-written layers it caches its input in forward, returns dx from backward and
keeps dW and db on itself. `gradprobe.targets.adapters.layer_target` makes it a target:

    gradprobe check samples/stateful_layer.py:case     # exit 0
"""

import numpy as np

from gradprobe.targets.adapters import layer_target


class PriceResponse:
    def __init__(self, features, outputs, seed=0):
        rng = np.random.default_rng(seed)
        self.W = rng.normal(scale=0.5, size=(features, outputs))
        self.b = np.zeros(outputs)

    def forward(self, x):
        self.x = x
        self.z = x @ self.W + self.b
        return np.logaddexp(0.0, self.z)  # softplus

    def backward(self, grad_y):
        dz = grad_y / (1.0 + np.exp(-self.z))  # softplus' = sigmoid
        self.dW = self.x.T @ dz
        self.db = dz.sum(axis=0)
        return dz @ self.W.T


features = np.random.default_rng(1).normal(size=(10, 5))  # 10 stores, 5 features each
case = layer_target(PriceResponse(5, 3), features, {"W": "dW", "b": "db"})
