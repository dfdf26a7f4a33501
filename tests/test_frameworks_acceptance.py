"""Section 6 scenarios met as a user meets them: float32 torch stacks, autograd Functions
with several inputs, what the user's code is handed. Right and wrong are set by closed forms
(d tanh x = 1 - tanh^2 x and d softplus x = sigmoid x, from any table of derivatives) and by
mpmath's differentiation of the same loss (framework_kit.mp_gradient)."""

from __future__ import annotations

import numpy as np
import pytest
from framework_kit import need

from gradprobe.api import probe_stack

torch = need("torch")

RNG = np.random.default_rng(23)
FIELDS = RNG.normal(size=(6, 3))  # soil moisture, sun hours, rain of six fields
YIELDS = RNG.normal(size=(6, 2))  # two crops' yields, standardised
W1, B1 = RNG.normal(size=(3, 4)) * 0.6, RNG.normal(size=4) * 0.2
W2, B2 = RNG.normal(size=(4, 2)) * 0.6, RNG.normal(size=2) * 0.2


class Dense:
    def __init__(self, name):
        self.name = name

    def forward(self, p, x, inputs):
        return x @ p["W"] + p["b"]

    def backward(self, p, x, inputs, g):
        return {"W": x.T @ g, "b": g.sum(0)}, g @ p["W"].T


class Tanh:
    """d tanh x = 1 - tanh^2 x; ``square=False`` forgets the square."""

    def __init__(self, square=True):
        self.name, self.square, self.upstream = "act", square, []

    def forward(self, p, x, inputs):
        return torch.tanh(x)

    def backward(self, p, x, inputs, g):
        self.upstream.append((type(g), g.dtype, x.dtype))
        t = torch.tanh(x)
        return {}, g * (1 - t * t if self.square else 1 - t)


class Squared:
    name = "loss"

    def forward(self, p, x, inputs):
        return 0.5 * ((x - inputs["y"]) ** 2).sum()

    def backward(self, p, x, inputs, g):
        return {}, g * (x - inputs["y"])


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("square", [True, False])
def test_a_torch_stack_in_its_own_dtype(dtype, square):
    """A float32 stack of torch layers: the upstream gradient reaches a layer's backward in
    the layer's own dtype (a float64 one made torch's matmul refuse the float32 weights:
    a crash on a correct stack), the right stack passes and the wrong tanh is where the
    error enters."""
    dt = getattr(torch, dtype)
    act = Tanh(square)
    params = {"hidden": {"W": torch.tensor(W1, dtype=dt), "b": torch.tensor(B1, dtype=dt)},
              "out": {"W": torch.tensor(W2, dtype=dt), "b": torch.tensor(B2, dtype=dt)}}
    inputs = {"x": torch.tensor(FIELDS, dtype=dt), "y": torch.tensor(YIELDS, dtype=dt)}
    report = probe_stack([Dense("hidden"), act, Dense("out"), Squared()], params, inputs)
    assert report.ok is square, [(t.name, t.status) for t in report.tensors]
    assert list(report.error_enters_at) == ([] if square else ["act"])
    assert act.upstream and all(kind is torch.Tensor and g == x for kind, g, x in act.upstream)
