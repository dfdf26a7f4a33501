"""A verdict taken on wide steps stands only where the smaller steps' quotients agree with it.

An RMS norm over float32 rows of which some read about 1e-4 curves on that scale and is flat
beyond it. Judged on its own float32 arithmetic (the loss cast to float32, no wider run),
the ladders left such an element undecided for rounding, and the wide-step windows, at steps
of 0.1 to 1, followed the model of a smooth quotient there: 0.31 +- 0.67 against a true
-475, which the smallest steps had shown (-474.8 at a step of 7.6e-6). A correct rule failed.

Reference: d/dx_j of sum_k g_k x_k w_k / rms(x), rms = sqrt(mean(x**2) + eps), is
g_j w_j / rms - x_j sum_k(g_k w_k x_k) / (n rms**3) (quotient and chain rules), checked
against mpmath below.
"""

from __future__ import annotations

import mpmath
import numpy as np

import gradprobe

F = np.float32
EPS = F(1e-8)
RNG = np.random.default_rng(0)
# Demo data: energy meters, the first four reading about 1e-4 (invented).
X = RNG.normal(size=(10, 5))
X[:4] *= 1e-4
Y = RNG.normal(size=(10, 1))
G = RNG.normal(1.0, 0.3, size=5)
W = RNG.normal(size=(5, 1))


def _parts(p, i):
    x = i["x"]
    rms = np.sqrt(np.mean(x * x, axis=1, keepdims=True) + EPS)
    yn = p["g"] * x / rms
    return rms, yn, yn @ p["w"] - i["y"]


def forward(p, i):
    r = _parts(p, i)[2]
    return np.float32(F(0.5) * np.sum(r * r) / F(r.shape[0]))


def _backward(factor):
    def backward(p, i):
        x = i["x"]
        rms, yn, r = _parts(p, i)
        dr = r / F(r.shape[0])
        dy = dr @ p["w"].T
        g = p["g"]
        dx = g * dy / rms - x * np.sum(g * dy * x, axis=1, keepdims=True) / (F(x.shape[1]) * rms ** 3)
        dx[7, 1] *= F(factor)
        return {"g": np.sum(dy * x / rms, axis=0), "w": yn.T @ dr, "x": dx}
    return backward


def _arrays():
    return {"g": G.astype(F), "w": W.astype(F)}, {"x": X.astype(F), "y": Y.astype(F)}


def test_the_rule_is_right_by_mpmath_on_a_small_row():
    params, inputs = _arrays()
    got = _backward(1.0)(params, inputs)["x"][3, 2]
    x = inputs["x"].astype(float)
    mpmath.mp.dps = 40

    def loss(v):
        total = mpmath.mpf(0)
        for row in range(10):
            vals = [mpmath.mpf(x[row, k]) for k in range(5)]
            if row == 3:
                vals[2] = v
            rms = mpmath.sqrt(sum(t * t for t in vals) / 5 + mpmath.mpf(float(EPS)))
            pred = sum(mpmath.mpf(float(params["g"][k])) * vals[k] / rms * mpmath.mpf(float(params["w"][k, 0]))
                       for k in range(5))
            total += (pred - mpmath.mpf(float(inputs["y"][row, 0]))) ** 2
        return total / 20

    ref = float(mpmath.diff(loss, mpmath.mpf(x[3, 2])))
    assert abs(got - ref) < 1e-3 * abs(ref)
    assert abs(ref) > 400  # the steep element the case is about


def test_a_flat_wide_window_does_not_fail_a_correct_element():
    params, inputs = _arrays()
    report = gradprobe.probe(forward, _backward(1.0), params, inputs)
    assert report.ok, gradprobe.render_text(report)
    assert report.tensor("x").status != "fail"


def test_an_element_wrong_by_30_percent_still_fails():
    params, inputs = _arrays()
    report = gradprobe.probe(forward, _backward(1.3), params, inputs)
    t = report.tensor("x")
    assert t.status == "fail", gradprobe.render_text(report)
    assert [7, 1] in [list(i) for i in t.bad_indices]
