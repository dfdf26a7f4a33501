"""A random-direction check counts as agreement only when its bound resolves the threshold.

Targets whose directional ladder cannot resolve it at the first steps: a seventh power
steeper than the steps (the derivative of x**7 is 7 x**6, the power rule), and absolute
values whose kinks sit 1e-9 from the point (d|x|/dx = sign(x) away from 0, d(x**2/2)/dx = x).
Each closed form is checked against mpmath's high-precision differentiation here. Checked by
directions only (``sample=0``): a wrong gradient must not pass, its correct twin must not fail.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe import probe
from gradprobe.engine.directions import check_direction
from gradprobe.engine.drawn import unit_direction

RNG = np.random.default_rng(11)
P = RNG.normal(scale=0.01, size=(3, 4))
A = RNG.uniform(0.5e7, 1.2e7, size=P.shape)  # a length scale of 1e-7 against steps of 1e-5
K = P - RNG.uniform(-1.0, 1.0, size=P.shape) / A  # a * (p - k) in (-1, 1)
W = RNG.uniform(-1.0, 1.0, size=P.shape)


def steep_forward(params, inputs):
    return float(np.sum(inputs["w"] * (inputs["a"] * (params["p"] - inputs["k"])) ** 7))


def steep_backward(params, inputs, sign=1.0):
    u = inputs["a"] * (params["p"] - inputs["k"])
    return {"p": sign * inputs["w"] * 7 * u ** 6 * inputs["a"]}  # power rule


def _mp_steep(x):
    return mpmath.fsum(mpmath.mpf(float(w)) * (mpmath.mpf(float(a)) * (xi - mpmath.mpf(float(k)))) ** 7
                       for w, a, k, xi in zip(W.ravel(), A.ravel(), K.ravel(), x))


def test_the_power_rule_gradient_agrees_with_mpmath():
    mpmath.mp.dps = 40
    g = steep_backward({"p": P}, {"a": A, "k": K, "w": W})["p"].ravel()
    x = [mpmath.mpf(float(v)) for v in P.ravel()]
    for j in (0, 5, 11):
        def along(t, j=j):
            return _mp_steep([xi + t if i == j else xi for i, xi in enumerate(x)])
        assert abs(g[j] - float(mpmath.diff(along, 0))) <= 1e-12 * abs(g[j])


@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_a_steep_direction_is_resolved_by_smaller_steps_or_not_counted(sign):
    """The direction's slope against mpmath: a bound that holds, or no agreement claimed."""
    mpmath.mp.dps = 40
    inputs = {"a": A, "k": K, "w": W}
    g = steep_backward({"p": P}, inputs, sign)["p"].ravel()
    pr = make_probe(lambda w: steep_forward({"p": w.reshape(P.shape)}, inputs), P.ravel(), g)
    u = unit_direction(P.size, np.random.default_rng(3))
    check = check_direction(pr, slice(0, P.size), u, threshold=True)
    x = [mpmath.mpf(float(v)) for v in P.ravel()]
    truth = float(mpmath.diff(lambda t: _mp_steep([xi + t * mpmath.mpf(float(ui)) for xi, ui in zip(x, u)]), 0))
    if not check.unresolved:
        assert abs(check.analytic + check.discrepancy - truth) <= 4 * check.error
    if sign < 0:
        assert not check.agrees
    else:
        assert not check.significant


@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_steep_targets_checked_by_directions_only(sign):
    inputs = {"a": A, "k": K, "w": W}
    report = probe(steep_forward, lambda p, i: steep_backward(p, i, sign), {"p": P}, inputs, sample=0)
    t = report.tensor("p")
    if sign < 0:
        assert t.status == "fail", (t.status, t.directions)
    else:
        assert t.status == "pass", (t.status, t.inconclusive_reason)


def _kinked(n, factor):
    rng = np.random.default_rng(5)
    p = rng.normal(size=n)
    k = p + rng.choice([-1.0, 1.0], size=n) * 1e-9 * rng.uniform(1.0, 2.0, size=n)
    w = rng.uniform(0.5, 1.5, size=n)

    def forward(params, inputs):
        return float(np.sum(inputs["w"] * np.abs(params["p"] - inputs["k"])) + 0.5 * np.sum(params["p"] ** 2))

    def backward(params, inputs):
        x = params["p"]
        return {"p": inputs["w"] * np.sign(x - inputs["k"]) + factor * x}

    return forward, backward, {"p": p}, {"w": w, "k": k}


def test_the_kinked_gradient_agrees_with_mpmath():
    mpmath.mp.dps = 40
    forward, backward, params, inputs = _kinked(12, 1.0)
    g = backward(params, inputs)["p"]
    for j in (0, 7):
        w, k, x = (mpmath.mpf(float(v)) for v in (inputs["w"][j], inputs["k"][j], params["p"][j]))
        assert abs(g[j] - float(mpmath.diff(lambda t: w * abs(t - k) + t * t / 2, x))) <= 1e-12 * abs(g[j])


@pytest.mark.parametrize("factor", [1.0, 1.5])
def test_kinks_a_step_away_in_every_direction_decide_nothing(factor):
    """Every direction crosses kinks 1e-9 away: a small tensor is swept coordinate-wise."""
    forward, backward, params, inputs = _kinked(12, factor)
    t = probe(forward, backward, params, inputs, sample=0).tensor("p")
    assert t.status == ("pass" if factor == 1.0 else "fail"), (t.status, t.directions)
    assert t.checked == 12


@pytest.mark.parametrize("factor", [1.0, 1.5])
def test_a_tensor_too_large_to_sweep_is_failed_or_inconclusive_and_says_why(factor):
    forward, backward, params, inputs = _kinked(5000, factor)
    t = probe(forward, backward, params, inputs, sample=0).tensor("p")
    if factor == 1.0:
        assert t.status == "inconclusive", (t.status, t.directions)
        assert "could not be resolved" in t.inconclusive_reason and "5000" in t.inconclusive_reason
    else:  # each direction's halves are split down to coordinates that confirm the bug
        assert t.status == "fail", (t.status, t.directions)
