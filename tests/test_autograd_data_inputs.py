"""An autograd Function whose backward returns None for a data input (a regression target,
not differentiable by design) is the usual way to say "no gradient here". Section 2 of the
protocol makes an input's gradient optional: an input gets checked where a gradient is given
for it. So an input whose rules give None is not checked (it used to fail as a dropped
gradient), while a param whose rules give None still fails: every param needs its gradient.

Reference: the Huber loss's derivative, clip(r, -delta, delta) for r = z - t (the standard
piecewise form; common practice), checked against mpmath's differentiation below.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from framework_kit import need

from gradprobe.api import probe

torch = need("torch")

DELTA = 1.0
RNG = np.random.default_rng(4)
Z = RNG.normal(size=7) * 1.5  # demand forecasts (invented)
T = RNG.normal(size=7) * 1.5  # the shop's recorded demand
C = RNG.uniform(0.5, 1.5, size=7)  # per-shop weights


class Huber(torch.autograd.Function):
    @staticmethod
    def forward(ctx, z, t):
        ctx.save_for_backward(z, t)
        r = z - t
        a = r.abs()
        return torch.where(a <= DELTA, 0.5 * r * r, DELTA * (a - 0.5 * DELTA))

    @staticmethod
    def backward(ctx, g):
        z, t = ctx.saved_tensors
        return g * torch.clamp(z - t, -DELTA, DELTA), None  # the recorded demand is data


class HuberNoGrad(Huber):
    @staticmethod
    def backward(ctx, g):
        return None, None  # wrong: the forecasts' gradient is dropped too


def _target(rule, dtype):
    def setup():
        as_t = lambda a: torch.tensor(a, dtype=dtype)  # noqa: E731
        return {"z": as_t(Z)}, {"t": as_t(T), "c": as_t(C)}

    def forward(params, inputs):
        return (rule.apply(params["z"], inputs["t"]) * inputs["c"]).mean()

    return setup, forward


def _mp_gradient():
    def loss(k, v):
        total = mpmath.mpf(0)
        for j in range(7):
            r = (v if j == k else mpmath.mpf(Z[j])) - mpmath.mpf(T[j])
            h = r * r / 2 if abs(r) <= DELTA else DELTA * (abs(r) - DELTA / 2)
            total += mpmath.mpf(C[j]) * h
        return total / 7
    return np.array([float(mpmath.diff(lambda v: loss(k, v), mpmath.mpf(Z[k]))) for k in range(7)])


def test_the_rule_is_right():
    setup, forward = _target(Huber, torch.float64)
    params, inputs = setup()
    with torch.enable_grad():
        z = params["z"].requires_grad_(True)
        (g,) = torch.autograd.grad(forward({"z": z}, inputs), [z])
    np.testing.assert_allclose(g.numpy(), _mp_gradient(), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("dtype", ["float64", "float32", "bfloat16"])
def test_a_data_input_with_no_gradient_is_not_checked(dtype):
    setup, forward = _target(Huber, getattr(torch, dtype))
    params, inputs = setup()
    report = probe(forward, None, params, inputs)
    names = [t.name for layer in report.layers for t in layer.tensors]
    assert "t" not in names, names
    assert report.tensor("z").status in ("pass", "kink")
    assert report.ok


def test_a_param_with_no_gradient_still_fails():
    setup, forward = _target(HuberNoGrad, torch.float64)
    params, inputs = setup()
    report = probe(forward, None, params, inputs)
    assert report.tensor("z").status == "fail"
    assert not report.ok
