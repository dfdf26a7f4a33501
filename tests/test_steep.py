"""Steep losses and kinks a step away: correct code is never failed on a bound whose
assumptions were not checked on that coordinate, and planted bugs in the same code still fail.

References: mpmath.diff at 40 digits is the truth for every derivative below. The analytic
values are the closed forms of the table of derivatives (any calculus table; from memory):
d/dx e^(c x) = c e^(c x), and d/dx |u| = sign(u) for u != 0 with the chain rule; each test
checks its closed form against mpmath at a few points before using it.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.engine.coordinates import RECHECK_LIMIT

mpmath.mp.dps = 40


# -- steep: exp(c w), higher derivatives growing like c**k ------------------------------------

def _steep_target(c, n, seed=0):
    """Sensor drift modelled as sum(exp(c w)) / c**2 over n gains near 0 (|c w| ~ 1)."""
    w = np.random.default_rng(seed).normal(size=n) / c

    def forward(p, i):
        return float(np.sum(np.exp(c * p["w"])) / c**2)

    def backward(p, i):
        return {"w": np.exp(c * p["w"]) / c}  # table: d/dx e^(c x) = c e^(c x)

    return forward, backward, w


@pytest.mark.parametrize("c", [660.0, 1e4])
def test_the_closed_form_of_the_steep_loss_is_mpmaths(c):
    forward, backward, w = _steep_target(c, 5)
    for k in range(5):
        def along(t, k=k):
            return mpmath.exp(c * t) / c**2
        ref = float(mpmath.diff(along, mpmath.mpf(float(w[k]))))
        assert backward({"w": w}, {})["w"][k] == pytest.approx(ref, rel=1e-13)


@pytest.mark.parametrize("c", [660.0, 1e4])
def test_a_steep_tensor_larger_than_the_recheck_budget_passes(c):
    """Every coordinate's first central quotient is off by (c h)**2 / 6 ~ 4e-6, beyond the
    threshold: more coordinates need a second estimate than the budget of ladders allows,
    and none may fail on the first pair's bound, which knows nothing of truncation."""
    n = RECHECK_LIMIT + 600
    forward, backward, w = _steep_target(c, n)
    report = probe(forward, backward, {"w": w})
    t = report.tensor("w")
    assert t.failed == 0 and t.status == "pass", (t.status, t.failed, t.inconclusive)


@pytest.mark.parametrize("planted", ["sign", "factor", "one element"])
def test_planted_bugs_in_the_steep_tensor_still_fail(planted):
    n = RECHECK_LIMIT + 600
    forward, backward, w = _steep_target(660.0, n)
    k = 3 * n // 4  # beyond the budget's worst-first order, wherever it lands

    def wrong(p, i):
        g = backward(p, i)["w"].copy()
        if planted == "sign":
            g = -g
        elif planted == "factor":
            g = 1.001 * g
        else:
            g[k] *= 1.01
        return {"w": g}

    t = probe(forward, wrong, {"w": w}).tensor("w")
    assert t.status == "fail"
    if planted == "one element":
        assert t.failed == 1 and t.bad_indices[0] == (k,)
    else:
        assert t.failed == n


# -- kinks a step away: absolute error with residuals near zero -------------------------------

def _abs_target(seed, n=20, m=50, spread=1e-6):
    """Mean absolute error of shop demand fitted almost exactly: residuals of about
    ``spread``, so that along a weight a kink lies about spread / |x| away."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(m, n))
    w = rng.normal(size=n)
    y = x @ w + rng.normal(size=m) * spread

    def forward(p, i):
        return float(np.mean(np.abs(i["x"] @ p["w"] - i["y"])))

    def backward(p, i):  # table: d/du |u| = sign(u) (u != 0), chain rule through x @ w
        return {"w": i["x"].T @ np.sign(i["x"] @ p["w"] - i["y"]) / len(i["y"])}

    return forward, backward, {"w": w}, {"x": x, "y": y}


def test_the_closed_form_of_the_absolute_error_is_mpmaths():
    forward, backward, params, inputs = _abs_target(3)
    x, y, w = (mpmath.matrix(a.tolist()) for a in (inputs["x"], inputs["y"], params["w"]))
    g = backward(params, inputs)["w"]
    for k in (0, 12):
        def along(t, k=k):
            v = w.copy()
            v[k] = t
            r = x * v - y
            return sum(abs(r[i]) for i in range(r.rows)) / r.rows
        ref = float(mpmath.diff(along, w[k]))
        assert g[k] == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("seed", range(6))
def test_kinks_a_step_away_fail_no_coordinate(seed):
    """Along each weight, kinks lie from about 1e-8 to 1e-5 away: the one-sided quotients
    at the usual steps differ, and the central quotient changes as the step crosses kinks.
    The derivative is defined (no residual is 0), backward is right, nothing may fail."""
    forward, backward, params, inputs = _abs_target(seed)
    t = probe(forward, backward, params, inputs).tensor("w")
    assert t.failed == 0, [d for d in t.details if d.status == "fail"]


@pytest.mark.parametrize("seed", [7, 9])
def test_kinks_a_step_away_in_a_tensor_larger_than_the_recheck_budget(seed):
    """Residuals of about 1e-5 over 100 rows: along each weight the nearest kink lies about
    1e-7 to 1e-5 away, so most first pairs straddle one; more of them look wrong than the
    budget of ladders covers."""
    forward, backward, params, inputs = _abs_target(seed, n=RECHECK_LIMIT + 100, m=100, spread=1e-5)
    t = probe(forward, backward, params, inputs).tensor("w")
    assert t.failed == 0, (t.failed, t.inconclusive, t.kinks)


@pytest.mark.parametrize("planted", ["sign", "factor"])
def test_planted_bugs_beside_the_kinks_still_fail(planted):
    forward, backward, params, inputs = _abs_target(3)

    def wrong(p, i):
        g = backward(p, i)["w"]
        return {"w": -g if planted == "sign" else 1.5 * g}

    assert probe(forward, wrong, params, inputs).tensor("w").status == "fail"
