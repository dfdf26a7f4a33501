"""float16-only code (a kernel that refuses every other type, so no wider run is possible)
whose bias lives on a small scale (|b| ~ 0.1): a 2x wrong bias gradient fails on the jittered
wide-step estimate of engine/sixteen.py where its discrepancy lies beyond the threshold,
SIGNIFICANCE bounds and any slope jump a kink within the steps could have; the right rule
does not fail, nor does a right rule with a kink closer to the point than the steps. And the
kink-jump bound itself on one-sided quotients of closed forms.

References outside gradprobe: mpmath's numerical differentiation at 30 digits of the same
loss written with mpmath (tests/framework_kit.mp_gradient), at the float16 values the kernel
computes with; for the kink bound, the one-sided difference quotients of x**2 and of |x|
written out exactly (table of derivatives: d/dx x**2 = 2x; d/dx |x| = sign(x), a jump of 2
at 0).
"""

from __future__ import annotations

import functools

import mpmath
import numpy as np
import pytest
from framework_kit import mp_gradient, rel_gap

from gradprobe.api import probe

F16 = np.float16
# Crop yields: three soil readings of ten plots feed four yield figures through a tanh layer.
_RNG = np.random.default_rng(22)
WEIGHTS = _RNG.normal(size=(3, 4)).astype(F16)
BIAS = (0.1 * _RNG.normal(size=4)).astype(F16)
SOIL = _RNG.normal(size=(10, 3)).astype(F16)
YIELD = _RNG.normal(size=(10, 4)).astype(F16)


def _only16(*arrays) -> None:
    for v in arrays:
        if v.dtype != F16:
            raise TypeError("this kernel takes float16 only")


def forward(p, i):
    _only16(p["W"], p["b"], i["x"])
    h = np.tanh(i["x"] @ p["W"] + p["b"])
    return F16(0.5) * np.sum((h - i["y"]) ** 2)


def _backward(factor: float):
    def backward(p, i):
        _only16(p["W"], p["b"], i["x"])
        h = np.tanh(i["x"] @ p["W"] + p["b"])
        g = (h - i["y"]) * (1 - h * h)
        return {"W": i["x"].T @ g, "b": g.sum(0) * F16(factor)}
    return backward


@functools.lru_cache(maxsize=None)
def _exact_bias_gradient() -> np.ndarray:
    """d loss / d b at the float16 values, by mpmath (the loss written in mpmath)."""
    x = [[mpmath.mpf(float(v)) for v in row] for row in SOIL.astype(np.float64)]
    y = [[mpmath.mpf(float(v)) for v in row] for row in YIELD.astype(np.float64)]
    w = [[mpmath.mpf(float(v)) for v in row] for row in WEIGHTS.astype(np.float64)]

    def loss(b):
        total = 0
        for r in range(10):
            for c in range(4):
                z = sum(x[r][k] * w[k][c] for k in range(3)) + b[c]
                total += (mpmath.tanh(z) - y[r][c]) ** 2
        return total / 2
    return mp_gradient(loss, BIAS.astype(np.float64))


def _inputs():
    return {"x": SOIL.copy(), "y": YIELD.copy()}


@pytest.mark.parametrize("factor", [1.0, 2.0])
def test_a_float16_only_kernel_with_a_small_bias_fails_a_2x_bias_rule_and_not_the_right_one(factor):
    with pytest.raises(TypeError):
        forward({"W": WEIGHTS.astype(np.float32), "b": BIAS}, _inputs())
    params = {"W": WEIGHTS.copy(), "b": BIAS.copy()}
    given = _backward(factor)(params, _inputs())["b"].astype(np.float64)
    exact = _exact_bias_gradient()
    # The right rule is the exact gradient to float16 rounding; the wrong one twice it.
    assert rel_gap(given, factor * exact) < 0.02
    report = probe(forward, _backward(factor), params, _inputs())
    assert report.compute_dtype == "float16"
    statuses = {t.name: t.status.value for t in report.tensors}
    if factor == 1.0:
        assert "fail" not in statuses.values(), statuses
    else:
        assert statuses["b"] == "fail", (statuses, report.tensor("b").inconclusive_reason)
        assert statuses["W"] != "fail", statuses
    assert np.array_equal(params["b"], BIAS)  # the caller's arrays unchanged


# Shop demand: eight prices on a scale of 0.1 (offsets from a list price), each with a penalty
# |b - c| past a threshold c a few thousandths away, a quadratic cost and a linear revenue.
_KINKED = np.random.default_rng(4)
PRICE = (0.1 * _KINKED.normal(size=8)).astype(F16)
_AWAY = np.where(_KINKED.random(8) < 0.5, -1.0, 1.0) * (np.abs(PRICE.astype(np.float64)) * 0.02 + 1e-3)
THRESHOLD = (PRICE.astype(np.float64) + _AWAY).astype(F16)
PENALTY = _KINKED.normal(size=8).astype(F16)
COST = _KINKED.normal(size=8).astype(F16)


def _kinked_forward(p, i):
    _only16(p["b"], i["c"])
    b = p["b"]
    return np.sum(i["w"] * np.abs(b - i["c"]) + i["v"] * b * b + i["w"] * F16(3.0) * b) + F16(10.0)


def _kinked_backward(p, i):
    """d/dx |x| = sign(x) away from 0, d/dx x**2 = 2x (table of derivatives)."""
    b = p["b"]
    return {"b": i["w"] * np.sign(b - i["c"]) + F16(2.0) * i["v"] * b + i["w"] * F16(3.0)}


def test_a_right_float16_rule_with_kinks_closer_than_the_wide_steps_does_not_fail():
    inputs = {"c": THRESHOLD, "w": PENALTY, "v": COST}
    gaps = np.abs(PRICE.astype(np.float64) - THRESHOLD.astype(np.float64))
    assert gaps.max() < 0.005 and gaps.min() > 0  # every kink within the levels, none at the point
    # The rule is the closed form at the float16 point, to float16 rounding.
    b = PRICE.astype(np.float64)
    exact = (PENALTY.astype(np.float64) * np.sign(b - THRESHOLD.astype(np.float64))
             + 2 * COST.astype(np.float64) * b + 3 * PENALTY.astype(np.float64))
    assert rel_gap(_kinked_backward({"b": PRICE}, inputs)["b"], exact) < 0.01
    report = probe(_kinked_forward, _kinked_backward, {"b": PRICE.copy()}, inputs)
    assert report.compute_dtype == "float16"
    assert report.tensor("b").status.value != "fail", report.tensor("b").status


def _one_sided_gaps(f, x: float, steps: np.ndarray) -> np.ndarray:
    """Right minus left one-sided quotients of ``f`` at ``x``, one row per step."""
    right = (f(x + steps) - f(x)) / steps
    left = (f(x) - f(x - steps)) / steps
    return (right - left)[:, None]


def test_the_kink_jump_bound_shows_a_kink_within_the_steps_and_not_a_smooth_bend():
    from gradprobe.engine.sixteen import _kink_jump

    steps = 0.05 * 2.0 ** np.arange(5.0)  # the levels s .. 16 s
    noise = np.full((5, 1), 1e-12)
    s = steps[:, None]
    # x**2: the gap is 2 s exactly (d/dx x**2 = 2x), its line through 0: no jump.
    smooth = _kink_jump(_one_sided_gaps(np.square, 0.3, steps), noise, s)
    assert smooth[0] < 1e-9
    # |x| a hundredth of the smallest step beside its kink: every level straddles it, and the
    # jump 2 (d/dx |x| = sign(x)) shows to within the kink's distance over the steps.
    kinked = _kink_jump(_one_sided_gaps(np.abs, 5e-4, steps), noise, s)
    assert abs(kinked[0] - 2.0) < 0.02
    # A gap that is not known at the widest levels (a non-finite loss there) bounds nothing.
    unknown = _kink_jump(_one_sided_gaps(np.abs, 5e-4, steps), np.full((5, 1), np.inf), s)
    assert np.isinf(unknown[0])
