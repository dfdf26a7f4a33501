"""16-bit code with a kink exactly at the point, judged on its own arithmetic: every central
quotient, however wide the step, is the mean of the two one-sided slopes, and float16's
rounding hid the one-sided gap from the wide windows' checks, so a correct coordinate whose
analytic value is its left slope failed (-0.0208 against central quotients of 0.001 to 0.01).
Where the wide steps' sides stay apart as the step shrinks and the analytic value is one of
them, the coordinate is at a kink, not wrong; a flipped quantile still fails.

Reference: the pinball loss rho_tau(r) = max(tau r, (tau - 1) r) has derivative tau for r > 0
and tau - 1 for r < 0 (Koenker, Quantile Regression, 2005, from memory; common practice).
"""

from __future__ import annotations

import numpy as np

import gradprobe

F = np.float16
TAU = np.array([0.1, 0.5, 0.9], dtype=F)
RNG = np.random.default_rng(0)
# Demo data: crop yields by field (invented); two fields' forecasts land exactly on the yield.
X = RNG.normal(size=(16, 3))
X[:2] = 0.0
Y = RNG.normal(2.0, 1.0, size=16)
Y[:2] = 2.0


def _residuals(p, i):
    """In float16 whatever the arrays' type (a kernel written for it: no wider run)."""
    x, y, w, b = (a.astype(F) for a in (i["x"], i["y"], p["W"], p["b"]))
    return y[:, None] - (x @ w + b)


def _target(tau_grad):
    def forward(p, i):
        r = _residuals(p, i)
        pin = np.maximum(TAU * r, (TAU - F(1)) * r)
        return np.sum(pin) / F(r.size)

    def backward(p, i):
        r = _residuals(p, i)
        dr = np.where(r >= F(0), tau_grad, tau_grad - F(1))  # the left slope at r = 0 exactly
        dpred = -dr / F(r.size)
        return {"W": i["x"].astype(F).T @ dpred, "b": np.sum(dpred, axis=0)}

    params = {"W": RNG.normal(scale=0.3, size=(3, 3)).astype(F), "b": np.full(3, 2.0, dtype=F)}
    return forward, backward, params, {"x": X.astype(F), "y": Y.astype(F)}


def test_the_left_slope_at_an_exact_zero_residual_is_no_failure():
    forward, backward, params, inputs = _target(TAU)
    assert np.count_nonzero(_residuals(params, inputs) == 0) >= 2  # the case: residuals exactly 0 in float16
    report = gradprobe.probe(forward, backward, params, inputs)
    assert report.tensor("b").status != "fail", gradprobe.render_text(report)
    assert report.ok


def test_a_flipped_quantile_still_fails():
    forward, backward, params, inputs = _target(F(1) - TAU)
    report = gradprobe.probe(forward, backward, params, inputs)
    assert not report.ok, gradprobe.render_text(report)
