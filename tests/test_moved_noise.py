"""A direction moves every element of a large tensor, and a loss summed from many large
signed terms then rounds far more than moves of a few params show (the target's measured
loss scale). The direction's own rounding is measured on a move of the whole tensor.

The target: crop-yield residuals weighed by signed weights, sum_i w_i (a_i (p_i - k_i))^2 over
60,000 fields, less its value at a reference fit (a deviance): terms reach ~100 while the
loss is below 1. Its gradient is the power
rule, 2 w_i a_i^2 (p_i - k_i) (d/dx x^2 = 2x, Abramowitz & Stegun 3.3.1, from memory),
checked here against mpmath's high-precision differentiation on a few elements.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

N = 60_000


def _fields(seed: int = 3):
    rng = np.random.default_rng(seed)
    inputs = {"a": rng.uniform(0.14, 0.43, N), "k": rng.uniform(0.0, 25.0, N),
              "w": rng.uniform(1e-6, 1.0, N) * rng.choice([-1.0, 1.0], N)}
    params = {"p": rng.uniform(0.2, 16.0, N)}
    inputs["reference"] = np.array(np.round(_sum(params, inputs), 1) - 0.3)
    return params, inputs


def _sum(params, inputs):
    u = inputs["a"] * (params["p"] - inputs["k"])
    return 0.24 * np.sum(inputs["w"] * u * u)


def forward(params, inputs):
    return _sum(params, inputs) - inputs["reference"]


def backward(params, inputs, wrong=None):
    g = 0.24 * inputs["w"] * 2.0 * inputs["a"] ** 2 * (params["p"] - inputs["k"])
    if wrong is not None:
        g[wrong] *= 1.01
    return {"p": g}


def test_the_terms_are_large_beside_the_loss_and_the_gradient_matches_mpmath():
    params, inputs = _fields()
    terms = 0.24 * np.abs(inputs["w"] * (inputs["a"] * (params["p"] - inputs["k"])) ** 2)
    assert terms.sum() > 1e4 * abs(forward(params, inputs)) > 1e3  # what makes the rounding large
    g = backward(params, inputs)["p"]
    mpmath.mp.dps = 40
    for i in (0, 17, N // 2, N - 1):
        a, k, w = (mpmath.mpf(float(inputs[n][i])) for n in "akw")
        exact = mpmath.diff(lambda x: mpmath.mpf("0.24") * w * (a * (x - k)) ** 2, mpmath.mpf(float(params["p"][i])))
        assert abs(g[i] - float(exact)) <= 1e-12 * abs(float(exact))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_correct_large_sum_of_signed_terms_passes(seed):
    params, inputs = _fields()
    before = params["p"].copy()
    t = probe(forward, backward, params, inputs, seed=seed).tensor("p")
    assert t.status == "pass", (t.status, t.inconclusive_reason)
    assert np.array_equal(params["p"], before)


@pytest.mark.parametrize("seed", [0, 1])
def test_one_typical_element_one_percent_off_is_failed_and_located(seed):
    params, inputs = _fields()
    g = backward(params, inputs)["p"]
    k = int(np.argsort(np.abs(g))[N // 2])  # a typical element, not the largest
    t = probe(forward, lambda p, i: backward(p, i, k), params, inputs, seed=seed).tensor("p")
    assert t.status == "fail" and (k,) in t.bad_indices, (t.status, t.inconclusive_reason)
