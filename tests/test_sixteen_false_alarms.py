"""16-bit code judged on its own arithmetic must never fail a correct gradient.

- The look for a 16-bit type inside read its evidence along the even move only (every param
  scaled by 1 + m): a loss near its minimum along that move changes alike both ways there,
  its first-order part 0, so no type was found and the code was judged as float64 or float32,
  failing gradients read off a loss its 16-bit rounding kept flat. Cases of the adversarial
  generator (tests/adversarial, category inside16), judged against mpmath by the generator.
- A loss term a * sin(k b) whose value lies below the loss's 16-bit rounding adds a * k cos(k b)
  to the true derivative (calculus; checked here against mpmath's differentiation), which no
  quotient of the 16-bit loss shows. Its analytic value varies within a few units of the
  type's grid, and a failure must allow what it varies by.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

import gradprobe

# 7314: bfloat16 inside float64 arrays, a quadratic loss at its minimum along the even move;
# 49149: float16 inside float32 arrays, sine and tanh terms.
EVEN_MOVE_SEEDS = [7314, 49149]


@pytest.mark.parametrize("seed", EVEN_MOVE_SEEDS)
def test_a_loss_at_its_minimum_along_the_even_move_is_no_false_alarm(seed):
    from adversarial import judged_cleanly

    o = judged_cleanly("inside16", seed)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_the_type_is_found_across_the_even_move():
    """7314's loss rounds to bfloat16 (its values lie on bfloat16's grid): the note names it."""
    from adversarial.bugs import make_case
    from adversarial.case import load

    ns = load(make_case("inside16", 7314))
    params, inputs = ns["setup"]()
    report = gradprobe.probe(ns["forward"], ns["backward"], params, inputs)
    assert any("bfloat16" in n for n in report.notes), report.notes


def test_a_sixteen_bit_staircase_the_look_misses_is_no_false_alarm(monkeypatch):
    """Were the 16-bit type not found at all (the look made blind here), 7314's losses, every
    one on bfloat16's grid, still do not fail it as float64 code."""
    from adversarial import judge

    import gradprobe.engine.numeric_side as numeric_side
    import gradprobe.engine.promote as promote

    monkeypatch.setattr(numeric_side, "narrower_compute_type", lambda *a, **k: None)
    monkeypatch.setattr(promote, "narrower_compute_type", lambda *a, **k: None)
    o = judge("inside16", 7314)
    assert not o["false_alarm"], (o["status"], o["expect"])


T = np.array([0.3, -0.2, 0.7, 0.1, -0.5])
W = np.array([0.9, 1.3, 0.6, 1.1, 0.8])
START = np.array([0.55, -0.35, 0.4, 0.25, -0.15])
A = 1e-4  # below half a unit of float16 at the loss (about 0.5: 2**-12)


def _ripple(k: float, bug: float = 0.0):
    """Shop-demand fit in float16 inside float64 arrays, with a ripple A sin(k p[1]) (its
    argument in float64, so that backward's value of its derivative is accurate) and
    ``bug``: p[0]'s gradient that much too large."""
    h = np.float16

    def forward(params, inputs):
        p = np.asarray(params["p"]).astype(h)
        r = p - T.astype(h)
        return float(np.sum(W.astype(h) * r * r) + h(A * np.sin(k * float(p[1]))))

    def backward(params, inputs):
        p = np.asarray(params["p"]).astype(h)
        g = h(2) * W.astype(h) * (p - T.astype(h))
        g[1] = g[1] + h(A * k * np.cos(k * float(p[1])))
        g[0] = g[0] * h(1 + bug)
        return {"p": g.astype(np.float64)}

    return forward, backward


def _truth(k: float) -> np.ndarray:
    """mpmath's derivative of the same expression at the float16 point, 30 digits."""
    mpmath.mp.dps = 30
    x = [mpmath.mpf(float(np.float16(v))) for v in START]

    def f(*v):
        main = sum(mpmath.mpf(w) * (vi - mpmath.mpf(t)) ** 2 for w, vi, t in zip(W, v, T))
        return main + mpmath.mpf(A) * mpmath.sin(k * v[1])

    return np.array([float(mpmath.diff(f, x, tuple(int(i == j) for i in range(5)))) for j in range(5)])


@pytest.mark.parametrize("k", [3000.0, 7000.0])
def test_a_ripple_below_the_loss_rounding_is_no_false_alarm(k):
    forward, backward = _ripple(k)
    a = backward({"p": START}, {})["p"]
    truth = _truth(k)
    # The backward is correct: within float16's rounding of mpmath's derivative.
    assert np.allclose(a, truth, rtol=4e-3, atol=2e-3), (a, truth)
    # And the ripple's share is far beyond the float16 threshold (0.044) of p[1]'s gradient.
    assert abs(A * k * np.cos(k * float(np.float16(START[1])))) > 0.1
    report = gradprobe.probe(forward, backward, {"p": START.copy()}, {})
    assert report.tensor("p").status != "fail", report.tensor("p")


def test_a_wrong_element_beside_the_ripple_still_fails():
    """The same target with p[0]'s gradient 10% too large (mpmath: 0.4496 exact)."""
    forward, backward = _ripple(3000.0, bug=0.10)
    report = gradprobe.probe(forward, backward, {"p": START.copy()}, {})
    assert report.tensor("p").status == "fail"
    assert (0,) in [tuple(i) for i in report.tensor("p").bad_indices]
