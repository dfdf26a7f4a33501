"""A first pair whose step overflows forward (an infinite quotient) passes nothing.

An infinite estimate has an infinite tolerance (the threshold times max(|a|, |n|)), within
which every analytic value lies: such a coordinate once passed whatever backward said
(adversarial steep-310744: exp of an argument 4.9e7 (x - k), finite at the point, infinite
at the first step of 7.6e-6). The ladders now go below the overflow and judge it there.

Reference: d/dx w exp(c (x - k)) = c w exp(c (x - k)) (table of derivatives, the
exponential's entry).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from gradprobe import probe

C, W = 1.0e6, 1.0e-10
K = 0.5 - 709.0 / C  # c (x - k) = 709 at x = 0.5: e^709 is finite, e^716 at the first step is not


def _check(factor: float):
    def forward(p, i):
        return float(np.sum(W * np.exp(C * (p["x"] - K)))) + float(np.sum(p["y"] ** 2))

    def backward(p, i):
        return {"x": factor * C * W * np.exp(C * (p["x"] - K)), "y": 2 * p["y"]}

    params = {"x": np.array([0.5]), "y": np.array([0.3, -0.2])}
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        t = probe(forward, backward, params, {}).tensor("x")
    assert not [w for w in seen if "gradprobe" in w.filename], [str(w.message) for w in seen]
    return t


@pytest.mark.parametrize("factor", [2.0, 0.5, -1.0])
def test_a_wrong_gradient_whose_first_step_overflows_is_not_passed(factor):
    t = _check(factor)
    assert t.status.value == "fail", (t.status, t.coordinates)


def test_a_correct_gradient_whose_first_step_overflows_passes():
    t = _check(1.0)
    assert t.status.value == "pass", (t.status, t.coordinates)
    assert np.all(np.isfinite(t.coordinates.numeric))


def test_steep_310744_as_first_found_leaks_no_warning():
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 310744)
    assert not o["false_alarm"] and not o["own_warnings"], (o["status"], o["own_warnings"])


def test_an_infinite_estimate_passes_no_analytic_value():
    """The rule itself: an estimate of +-inf (a quotient across an overflow) passes nothing,
    whatever the analytic value; it is undecided (its error is no bound on anything)."""
    from probe_kit import make_probe

    from gradprobe.common.status import PASS
    from gradprobe.engine.ladder import Estimate
    from gradprobe.engine.verdict import verdicts

    p = make_probe(lambda v: float(np.sum(v ** 2)), np.array([0.5, -1.0, 2.0]), np.array([1.0, -2.0, 4.0]))
    a = np.array([1.0, -2.0, 4.0])
    est = Estimate(np.array([np.inf, -np.inf, np.inf]), np.array([0.0, 1.0, np.inf]))
    status = verdicts(p, a, est, p.tolerance(np.arange(3), est.value))
    assert not np.any(status == PASS), status


def test_steep_460909_second_difference_overflow_leaks_no_warning():
    """A chain-rule bug (adversarial steep-460909) whose smooth-range probe divides a huge
    second difference by the square of a tiny step: the quotient overflows. It is no
    evidence of a steady bend, and numpy's warning stays inside gradprobe."""
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 460909)
    assert o["found"] and not o["own_warnings"], (o["status"], o["own_warnings"])
