"""float64 code whose loss is a long sum: the loss's rounding, spread over ladder steps of
about 1e-5, hides the threshold on coordinates whose gradient is a thousandth of the
tensor's typical one, while the loss is quadratic there up to the nearest kink (a weight's
own |w|, far beyond those steps). Wider steps, in windows whose error model is checked on
the quotients (as for narrow code), resolve them: a correct model passes, and an error of a
few thresholds on such a coordinate fails.

References: d(r . r / 2)/dw = X^T r for r = X w - y, and d|w|/dw = sign(w) (the standard
table of derivatives).
"""

from __future__ import annotations

import numpy as np

import gradprobe

# Demo data: energy meter readings by site (invented).
N_SITES, N_FEATURES, N_METERS = 30, 80, 60
RNG = np.random.default_rng(11)
SITES = RNG.normal(size=(N_SITES, N_FEATURES))
READINGS = RNG.normal(size=(N_SITES, N_METERS))
W0 = np.random.default_rng(5).normal(size=(N_FEATURES, N_METERS)) * 0.1
PENALTY = 0.05


def _gradient(w):
    return SITES.T @ (SITES @ w - READINGS) / N_SITES + PENALTY * np.sign(w)


def _model(wrong_at=None, by=0.0):
    def forward(params, inputs):
        r = SITES @ params["w"] - READINGS
        return 0.5 * float(np.sum(r * r)) / N_SITES + PENALTY * float(np.sum(np.abs(params["w"])))

    def backward(params, inputs):
        g = _gradient(params["w"])
        if wrong_at is not None:
            g[wrong_at] += by
        return {"w": g}

    return forward, backward


def _smallest_gradient():
    """The element whose gradient is smallest against the tensor's, away from its kink."""
    g = _gradient(W0)
    far = np.abs(W0) > 0.02
    k = int(np.argmin(np.where(far, np.abs(g), np.inf)))
    return np.unravel_index(k, g.shape), g


def test_a_long_sum_with_tiny_gradients_passes():
    where, g = _smallest_gradient()
    rms = float(np.sqrt(np.mean(g * g)))
    assert abs(g[where]) < 2e-3 * rms  # the case this file is about
    forward, backward = _model()
    report = gradprobe.probe(forward, backward, {"w": W0.copy()}, {})
    assert report.tensor("w").status == "pass", gradprobe.render_text(report)


def test_an_error_of_a_few_thresholds_on_a_tiny_gradient_fails():
    where, g = _smallest_gradient()
    rms = float(np.sqrt(np.mean(g * g)))
    scale = max(abs(float(g[where])), 1e-3 * rms)  # the coordinate's scale: its gradient, or the floor
    forward, backward = _model(where, 6e-6 * scale)  # 6 thresholds of 1e-6
    report = gradprobe.probe(forward, backward, {"w": W0.copy()}, {})
    t = report.tensor("w")
    assert t.status == "fail", gradprobe.render_text(report)
    assert [list(i) for i in t.bad_indices] == [list(where)]
