"""A tensor the user samples (``--sample N`` below its size) gets random-direction checks as
the setting's help says ("2 for the tensors that are sampled"), also in a small target:
otherwise a wrong element outside the sample passes unseen. Reference: the power rule,
d(c x**2)/dx = 2 c x (the standard table of derivatives)."""

from __future__ import annotations

import numpy as np
import pytest

import gradprobe

WEIGHTS = np.linspace(0.5, 2.0, 12).reshape(3, 4)  # shop demand weights (demo data)


def forward(params, inputs):
    return float(np.sum(inputs["c"] * params["w"] ** 2))


def backward(params, inputs):
    g = 2.0 * inputs["c"] * params["w"]  # the power rule
    g[0, 0] *= 1.01  # one element 1% off: the smallest gradient, last to be sampled
    return {"w": g}


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_sampled_tensor_of_a_small_target_gets_directions(seed):
    params = {"w": np.linspace(0.1, 1.2, 12).reshape(3, 4)}
    inputs = {"c": WEIGHTS}
    report = gradprobe.probe(forward, backward, params, inputs, sample=3, seed=seed)
    t = report.tensor("w")
    assert len(t.directions) > 0
    assert t.status == "fail", gradprobe.render_text(report)
