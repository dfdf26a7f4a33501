"""16-bit coordinates whose loss moves by the same amount at every step (engine/steady_difference.py).

A layer norm over greenhouse sensors, six readings a greenhouse, computed in bfloat16
(ml_dtypes) throughout; three greenhouses' sensors are stuck near 1.0 (a spread of 1e-5, below
bfloat16's spacing there, 0.0078), so their rows are exactly constant in bfloat16, and the norm
over them, (x - mean) / sqrt(var + eps), is steep within sqrt(eps) = 1e-3 of the point and
flat beyond: a step of one grid unit already carries an element past it. The loss moved by
about the same amount at every step, the wide steps read a slope of about -1.3, and a correct
-94 failed. Such a coordinate is undecided now, with the reason, and so is the tensor along
directions; a wrong gain gradient, which the moving sensors resolve, still fails.

Reference: d/dx_j of sum_k c_k y_k, y = gamma (x - mean) / sqrt(var + eps) + beta, is
(g_j - mean(g) - xh_j mean(g xh)) / sqrt(var + eps) with g = c gamma, xh = (x - mean) /
sqrt(var + eps) (the layer norm's derivative by the quotient and chain rules, common
practice), checked against mpmath's differentiation of the same loss below.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

import gradprobe
from gradprobe.engine.steady_difference import jump_like

EPS = 1e-6


def _target(gain_factor: float = 1.0):
    bf16 = np.dtype(pytest.importorskip("ml_dtypes").bfloat16)
    rng = np.random.default_rng(7)
    x = rng.normal(size=(8, 6))
    x[:3] = 1.0 + 1e-5 * rng.normal(size=(3, 6))  # stuck sensors (invented demo data)
    gamma, beta, t = rng.normal(1.0, 0.2, size=6), rng.normal(scale=0.1, size=6), rng.normal(size=(8, 6))
    one, eps = bf16.type(1), bf16.type(EPS)

    def parts(p, i):
        xs = i["x"]
        xc = xs - np.mean(xs, axis=1, keepdims=True)
        inv = one / np.sqrt(np.mean(xc * xc, axis=1, keepdims=True) + eps)
        xh = xc * inv
        return xh, inv, p["gamma"] * xh + p["beta"]

    def forward(p, i):
        d = parts(p, i)[2] - i["t"]
        return bf16.type(bf16.type(0.5) * np.sum(d * d) / bf16.type(d.shape[0]))

    def backward(p, i):
        xh, inv, y = parts(p, i)
        dy = (y - i["t"]) / bf16.type(y.shape[0])
        g = dy * p["gamma"]
        dx = inv * (g - np.mean(g, axis=1, keepdims=True) - xh * np.mean(g * xh, axis=1, keepdims=True))
        return {"gamma": np.sum(dy * xh, axis=0) * bf16.type(gain_factor), "beta": np.sum(dy, axis=0), "x": dx}

    params = {"gamma": gamma.astype(bf16), "beta": beta.astype(bf16)}
    inputs = {"x": x.astype(bf16), "t": t.astype(bf16)}
    return forward, backward, params, inputs


def _mpmath_derivative(params, inputs, row: int, col: int) -> float:
    """The loss's derivative in x[row, col] at the arrays' values, by mpmath at 40 digits."""
    x, t = (np.asarray(inputs[k], dtype=float) for k in ("x", "t"))
    gamma, beta = (np.asarray(params[k], dtype=float) for k in ("gamma", "beta"))
    mpmath.mp.dps = 40

    def loss(v):
        total = mpmath.mpf(0)
        for r in range(x.shape[0]):
            vals = [mpmath.mpf(x[r, k]) for k in range(6)]
            if r == row:
                vals[col] = v
            mean = sum(vals) / 6
            inv = 1 / mpmath.sqrt(sum((u - mean) ** 2 for u in vals) / 6 + mpmath.mpf(EPS))
            total += sum((gamma[k] * (vals[k] - mean) * inv + beta[k] - t[r, k]) ** 2 for k in range(6))
        return total / (2 * x.shape[0])

    return float(mpmath.diff(loss, mpmath.mpf(x[row, col])))


def test_the_rule_is_right_by_mpmath_on_a_stuck_row():
    forward, backward, params, inputs = _target()
    got = backward(params, inputs)["x"].astype(float)
    assert np.all(np.asarray(inputs["x"][:3], dtype=float) == 1.0)  # the stuck rows are constant in bfloat16
    for row, col in ((0, 0), (2, 5), (5, 3)):
        ref = _mpmath_derivative(params, inputs, row, col)
        assert abs(got[row, col] - ref) < 0.02 * max(abs(ref), 1.0), (row, col, got[row, col], ref)
    assert abs(_mpmath_derivative(params, inputs, 2, 5)) > 10  # the steep element the case is about


def test_a_correct_norm_over_stuck_rows_is_no_false_alarm():
    report = gradprobe.probe(*_target())
    x = report.tensor("x")
    assert report.ok and x.status != "fail", gradprobe.render_text(report)
    steady = [d for d in x.details if d.index[0] < 3 and "about the same amount" in (d.reason or "")]
    assert steady, gradprobe.render_text(report)  # said undecided, with why


def test_a_wrong_gain_gradient_still_fails():
    """The gain's gradient 1.5 times the right one: it comes from the sensors that move (a
    stuck row's normalised values are 0), which bfloat16 resolves, so the gain fails. (A wrong
    term in x's gradient is not resolved here: the stuck rows' gradients of about 90 set the
    scale 16-bit rounding is judged against, and the moving rows' are near 1.)"""
    report = gradprobe.probe(*_target(gain_factor=1.5))
    assert report.tensor("gamma").status == "fail", gradprobe.render_text(report)
    assert report.tensor("x").status != "fail", gradprobe.render_text(report)


@pytest.mark.parametrize(("moves", "jump"), [
    (lambda h: 3.0 * h, False),  # a slope: the move grows with the step
    (lambda h: 3.0 * h - 0.5 * h**3, False),  # a smooth bend
    (lambda h: np.full_like(h, 0.25), True),  # a jump at the point: the same move at every step
    (lambda h: 0.25 + 1e-3 * h, True),  # a jump beside a faint slope
    (lambda h: np.zeros_like(h), False),  # a loss that keeps its value: a claimed slope may fail
    (lambda h: 0.25 * (-1.0) ** np.arange(h.size), False),  # rounding of either sign
    (lambda h: np.minimum(3.0 * h, 0.2), False),  # a slope, then a loss that levels off
    (lambda h: np.where(h < 0.01, 1e-3, 0.25), True),  # a grid unit's move, then the jump
])
def test_jump_like_tells_a_jump_from_a_slope(moves, jump):
    """Facts of calculus (common practice): f(x + h) - f(x - h) is 2 h f' + O(h**3) for a
    smooth f, and the jump's size for a step across a jump, whatever the step."""
    steps = 2.0 ** np.arange(-8.0, 0.0)
    assert jump_like(steps, moves(steps), 1e-3) is jump


def _shop_classes(batch_factor: float):
    """Which of 5 product groups sells out first: a softmax cross-entropy in bfloat16 over 20
    weeks, 5 of them promotion weeks whose logits lie tens apart (invented demo data); the
    gradient ``batch_factor`` times the right one."""
    bf16 = np.dtype(pytest.importorskip("ml_dtypes").bfloat16)
    rng = np.random.default_rng(0)
    x = rng.normal(size=(20, 4))
    x[:5] *= 15.0
    w, b = rng.normal(scale=0.8, size=(4, 5)), rng.normal(scale=0.2, size=5)
    y = rng.integers(0, 5, size=20)
    z = x @ w
    y[:3], y[3:5] = np.argmax(z[:3], axis=1), np.argmin(z[3:5], axis=1)
    n = bf16.type(20)

    def logp(p, i):
        z = (i["x"] @ p["W"]).astype(bf16) + p["b"]
        m = np.max(z, axis=1, keepdims=True)
        return z - (m + np.log(np.sum(np.exp(z - m), axis=1, keepdims=True)))

    def forward(p, i):
        return bf16.type(-np.sum(logp(p, i)[np.arange(20), i["y"]]) / n)

    def backward(p, i):
        d = np.exp(logp(p, i))
        d[np.arange(20), i["y"]] -= bf16.type(1)
        d = d / n * bf16.type(batch_factor)
        return {"W": (i["x"].T @ d).astype(bf16), "b": np.sum(d, axis=0)}

    return forward, backward, {"W": w.astype(bf16), "b": b.astype(bf16)}, {"x": x.astype(bf16), "y": y}


def test_a_bias_whose_loss_moves_by_a_grid_unit_or_two_keeps_its_failure():
    """The gradient not divided by the batch (20 times the right one): the bias's loss moves
    by one or two units of bfloat16's grid at every step, with the slope's sign. Moves that
    small are a rounding's, not a jump's: the bias still fails, and a right gradient does not."""
    report = gradprobe.probe(*_shop_classes(20.0))
    assert report.tensor("b").status == "fail", gradprobe.render_text(report)
    right = gradprobe.probe(*_shop_classes(1.0))
    assert right.tensor("b").status != "fail", gradprobe.render_text(right)
