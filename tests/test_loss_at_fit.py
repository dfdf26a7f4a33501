"""A loss at the rounding level of its own terms: a shop-demand model fitted so closely that
each residual is 0 or one unit in the last place of the recorded demand.

The loss c * mean(r**2), r = (b + k X w) - y, is then about 2e-38, and its float64 value moves
only when b + k X w crosses a unit of its last place (1.1e-19 at 5.3e-4): in whole stairs
about as tall as the loss itself, 1e14 times the few units of eps |f| a loss value's rounding
is usually taken as. The slope of the exact expression moves the loss by far less than one
stair over every step within the params' scale, so a loss that does not change there says
nothing of the slope: a correct backward must not fail. A param the loss ignores, given a
gradient, still fails.

References: the least-squares gradient 2 c k X^T r / n (common practice; checked here against
mpmath.diff of the same expression at 40 digits, at the float64 inputs).
"""

from __future__ import annotations

import mpmath
import numpy as np

from gradprobe import probe

mpmath.mp.dps = 40

RNG = np.random.default_rng(1)
X = RNG.normal(size=(4, 3))  # weekly promotions (scaled)
W0 = RNG.normal(size=3) * 1e-3
B, K, C = 5.259e-4, 1e-17, 3.5


def _model(w, x):
    return B + K * (x @ w[:3])  # a fourth weight, where given, the model ignores


M = _model(W0, X)
Y = M + np.array([0.0, 0.0, 1.0, -1.0]) * np.spacing(M)  # recorded demand: the fit to a unit


def _forward(p, i):
    r = _model(p["w"], i["x"]) - i["y"]
    return C * np.mean(r * r)


def _backward(p, i):
    r = _model(p["w"], i["x"]) - i["y"]
    return {"w": 2.0 * C * K * i["x"].T @ r / r.size}


def _along(j, t):
    """The loss at w0 with w[j] = t, exactly (mpmath), at the float64 inputs."""
    total = mpmath.mpf(0)
    for row, y in zip(X, Y):
        w = [mpmath.mpf(v) for v in W0]
        w[j] = t
        m = mpmath.mpf(B) + mpmath.mpf(K) * sum(mpmath.mpf(a) * v for a, v in zip(row, w))
        total += (m - mpmath.mpf(y)) ** 2
    return mpmath.mpf(C) * total / len(Y)


def test_the_loss_does_not_move_where_its_exact_slope_moves_it_far_beyond_eps_f():
    """mpmath: the exact derivative along each weight is nonzero, and the closed form agrees
    with it to within the residuals' own rounding (half a unit of 1.1e-19 against residuals of
    1e-19). At a move of 1e-6 the exact expression changes by |slope| 1e-6, over 1e9 times the
    8 eps |f| a loss value's rounding is usually taken as, yet the float64 loss does not
    change at all: its rounding is the stair, not eps |f|."""
    ours = _backward({"w": W0}, {"x": X, "y": Y})["w"]
    f0 = _forward({"w": W0}, {"x": X, "y": Y})
    for j in range(3):
        exact = float(mpmath.diff(lambda t: _along(j, t), mpmath.mpf(W0[j])))
        assert exact != 0.0
        assert abs(ours[j] - exact) <= 2.0 * abs(exact) + 1e-37
        assert abs(exact) * 1e-6 > 1e9 * 8.0 * np.finfo(np.float64).eps * f0
        for sign in (1.0, -1.0):
            w = W0.copy()
            w[j] += sign * 1e-6
            assert _forward({"w": w}, {"x": X, "y": Y}) == f0


def test_a_correct_gradient_is_not_failed():
    report = probe(_forward, _backward, {"w": W0}, {"x": X, "y": Y})
    t = report.tensor("w")
    assert t.status != "fail", t
    assert t.status == "inconclusive" and "absorbs" in t.inconclusive_reason


def test_a_gradient_for_a_weight_the_loss_ignores_still_fails():
    """Beside the three weights, a fourth the model never reads: its derivative is 0 (the loss
    does not depend on it), and a backward that gives it 0.5 fails there, with the stairs shown."""
    w = np.append(W0, 0.7)

    def wrong(p, i):
        g = _backward(p, i)["w"]
        return {"w": np.append(g, 0.5)}

    t = probe(_forward, wrong, {"w": w}, {"x": X, "y": Y}).tensor("w")
    assert t.status == "fail"
    assert t.bad_indices == ((3,),)
