"""Targets for bench/scale.py: tanh networks forecasting shop demand from store features."""

from __future__ import annotations

import numpy as np


class Network:
    """A tanh network with squared-error loss; ``wrong`` plants one wrong gradient element."""

    def __init__(self, sizes, batch, seed=0, wrong=None):
        self.sizes, self.batch, self.seed, self.wrong = sizes, batch, seed, wrong

    def setup(self):
        rng = np.random.default_rng(self.seed)
        params = {}
        for k, (m, n) in enumerate(zip(self.sizes[:-1], self.sizes[1:]), start=1):
            params[f"layer{k}"] = {"W": rng.normal(scale=1 / np.sqrt(m), size=(m, n)),
                                   "b": rng.normal(scale=0.1, size=n)}
        inputs = {"x": rng.normal(size=(self.batch, self.sizes[0])),
                  "demand": rng.normal(size=(self.batch, self.sizes[-1]))}
        return params, inputs

    def _layers(self, params, inputs):
        acts = [inputs["x"]]
        for k in range(1, len(self.sizes)):
            z = acts[-1] @ params[f"layer{k}"]["W"] + params[f"layer{k}"]["b"]
            acts.append(self._act(z) if k < len(self.sizes) - 1 else z)
        return acts

    @staticmethod
    def _act(z):
        return np.tanh(z)

    @staticmethod
    def _slope(act):
        """The activation's derivative, from its output: tanh' = 1 - tanh^2."""
        return 1 - act**2

    def forward(self, params, inputs):
        out = self._layers(params, inputs)[-1]
        return float(0.5 * np.sum((out - inputs["demand"]) ** 2) / self.batch)

    def backward(self, params, inputs):
        acts = self._layers(params, inputs)
        d = (acts[-1] - inputs["demand"]) / self.batch
        grads = {}
        for k in range(len(self.sizes) - 1, 0, -1):
            grads[f"layer{k}"] = {"W": acts[k - 1].T @ d, "b": d.sum(axis=0)}
            if k > 1:
                d = (d @ params[f"layer{k}"]["W"].T) * self._slope(acts[k - 1])
        if self.wrong is not None:
            name, index = self.wrong
            layer, tensor = name.split(".")
            g = grads[layer][tensor]
            g[index] += 0.5 * np.sqrt(np.mean(g**2)) + abs(g[index])
        return grads


def one_wrong_200k():
    """About 200k parameters, one wrong element of layer2.W."""
    return Network([200, 400, 300, 10], batch=32, wrong=("layer2.W", (17, 42)))


def correct_1m():
    """About 1M parameters, all gradients right."""
    return Network([1000, 800, 250, 1], batch=16, seed=1)


class CropGrowth:
    """Logistic biomass growth of 24 field plots over 9,000 steps, with its adjoint.

    A scientific model with a hand-derived backward pass: the forward is a Python time loop
    over small arrays (CPU-bound, one core, about 20 ms); backward runs the adjoint recursion.
    """

    plots, days, dt = 24, 9000, 0.0005

    def setup(self):
        rng = np.random.default_rng(2)
        params = {"growth": {"rate": rng.uniform(0.2, 0.6, self.plots),
                             "capacity": rng.uniform(5.0, 9.0, self.plots)}}
        inputs = {"start": rng.uniform(0.2, 1.0, self.plots), "harvest": rng.uniform(2.0, 6.0, self.plots)}
        return params, inputs

    def _path(self, params, inputs):
        r, k = params["growth"]["rate"], params["growth"]["capacity"]
        y = inputs["start"].copy()
        path = [y]
        for _ in range(self.days):
            y = y + self.dt * r * y * (1 - y / k)
            path.append(y)
        return path

    def forward(self, params, inputs):
        final = self._path(params, inputs)[-1]
        return float(0.5 * np.sum((final - inputs["harvest"]) ** 2))

    def backward(self, params, inputs):
        r, k = params["growth"]["rate"], params["growth"]["capacity"]
        path = self._path(params, inputs)
        lam = path[-1] - inputs["harvest"]
        d_rate, d_capacity = np.zeros(self.plots), np.zeros(self.plots)
        for y in reversed(path[:-1]):
            d_rate += lam * self.dt * y * (1 - y / k)
            d_capacity += lam * self.dt * r * y**2 / k**2
            lam = lam * (1 + self.dt * r * (1 - 2 * y / k))
        return {"growth": {"rate": d_rate, "capacity": d_capacity}, "start": lam}


def heavy_20ms():
    """72 coordinates behind a forward of about 20 ms."""
    return CropGrowth()


class KinkedNetwork(Network):
    """A ReLU twin of :class:`Network` whose first layer starts at zero for a quarter of its
    units: their pre-activations are exactly 0 in every row (kinks that coincide), so the
    check also takes its second look off the kinks."""

    def setup(self):
        params, inputs = super().setup()
        quarter = self.sizes[1] // 4
        params["layer1"]["W"][:, :quarter] = 0.0
        params["layer1"]["b"][:quarter] = 0.0
        return params, inputs

    @staticmethod
    def _act(z):
        return np.maximum(z, 0.0)

    @staticmethod
    def _slope(act):
        """ReLU's derivative from its output (0 at the kink: the convention of the code)."""
        return act > 0

def _memory_hidden() -> int:
    import os

    size = int(os.environ.get("MEMORY_PARAMS", "1000000"))
    return max(8, int((size - 10) / 61))  # 50 inputs, hidden units, 10 outputs


def tanh_1m():
    """About 1M parameters (MEMORY_PARAMS), tanh, all gradients right (bench/memory.py)."""
    return Network([50, _memory_hidden(), 10], batch=64, seed=0)


def kinked_1m():
    """About 1M parameters (MEMORY_PARAMS), ReLU with coinciding kinks (bench/memory.py)."""
    return KinkedNetwork([50, _memory_hidden(), 10], batch=64, seed=0)
