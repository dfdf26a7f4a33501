"""A loss flat on both sides of the point: a zone where every unit a param feeds is switched
off (its derivative is 0 there) is told from rounding that absorbs the steps (sums of much
larger terms), where the derivative is not 0 and no failure may be read off the flat loss.

References: mpmath.diff at 40 digits of the same expressions; ReLU'(u) = 0 for u < 0 (the
table of derivatives of max(u, 0); common practice), d/db (B + c b) - B = c. The property
suite's case bug-derivative-5031 (a ReLU derivative planted wrong, its units switched off at
the point) is judged by that suite's own expectations (tests/composer).
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

mpmath.mp.dps = 40

# Irrigation valves: four units fed by one shared offset b, all closed at the point (their
# inputs 0.3 to 0.6 below zero), two opening as b rises and two as it falls.
U = np.array([1.0, -1.0, 2.0, -2.0])
V = np.array([1.0, 0.5, 1.0, 0.3])
B0 = 0.5
Z = -U * B0 - np.array([0.3, 0.4, 0.5, 0.6])


def _forward(p, i):
    return float(np.sum(i["v"] * np.maximum(i["u"] * p["b"][0] + i["z"], 0.0)) + np.sum(p["w"] ** 2))


def _backward(p, i):  # table: d/du max(u, 0) = 1 for u > 0, 0 for u < 0
    pre = i["u"] * p["b"][0] + i["z"]
    return {"b": np.array([np.sum(i["v"] * i["u"] * (pre > 0))]), "w": 2 * p["w"]}


def _through_closed_units(p, i):  # the planted bug: every unit's derivative taken as 1
    return {"b": np.array([np.sum(i["v"] * i["u"])]), "w": 2 * p["w"]}


PARAMS = {"b": np.array([B0]), "w": np.array([0.3, -1.2, 0.7])}
INPUTS = {"u": U, "v": V, "z": Z}


def _along_b(t):
    return sum(mpmath.mpf(v) * max(mpmath.mpf(u) * t + mpmath.mpf(z), 0) for u, v, z in zip(U, V, Z))


def test_the_closed_units_have_derivative_zero_by_mpmath():
    ref = float(mpmath.diff(_along_b, mpmath.mpf(B0)))
    assert ref == 0.0
    assert _backward(PARAMS, INPUTS)["b"][0] == ref
    assert abs(_through_closed_units(PARAMS, INPUTS)["b"][0] - ref) > 1.0


def test_a_gradient_through_closed_units_fails():
    """The loss is the same at every step up to 0.125 on both sides (first step about 6e-6,
    where the wrong slope 1.9 predicts changes of 1e-5, 1e11 times the loss's rounding), and
    changes at a step of 2, on both sides: past the valves' edges, where it grows from 0
    continuously, not in steps of a rounding that coarse."""
    t = probe(_forward, _through_closed_units, PARAMS, INPUTS).tensor("b")
    assert t.status == "fail", [(d.status, d.reason) for d in t.details]


def test_the_correct_gradient_of_the_closed_units_passes():
    t = probe(_forward, _backward, PARAMS, INPUTS).tensor("b")
    assert t.status == "pass", [(d.status, d.reason) for d in t.details]


# Absorbed: (B + c b) - B with B = 1e9 rounds at 1.2e-7, and c b moves by 6e-9 at the first
# step: the loss does not change there, and does in whole steps of 1.2e-7 further out.
BIG, SLOPE = 1e9, 1e-3


def _absorbed(p, i):
    return float((BIG + SLOPE * p["b"][0]) - BIG + np.sum(p["w"] ** 2))


def _absorbed_backward(p, i):  # d/db (B + c b) - B = c
    return {"b": np.array([SLOPE]), "w": 2 * p["w"]}


def test_the_absorbed_slope_is_mpmaths():
    ref = float(mpmath.diff(lambda t: (mpmath.mpf(BIG) + mpmath.mpf(SLOPE) * t) - mpmath.mpf(BIG),
                            mpmath.mpf(B0)))
    assert _absorbed_backward(PARAMS, INPUTS)["b"][0] == pytest.approx(ref, rel=1e-15)


def test_a_slope_absorbed_by_rounding_is_no_false_alarm():
    t = probe(_absorbed, _absorbed_backward, PARAMS, INPUTS).tensor("b")
    assert t.status != "fail", [(d.status, d.numeric, d.error_estimate, d.reason) for d in t.details]


def test_the_property_suites_relu_derivative_bug_fails():
    from composer.cases import make_case, problems

    case = make_case("bug-derivative", 5031)
    report = probe(case.net.forward, case.net.backward, case.net.params, case.net.inputs)
    found = [p for p in problems(report, case) if p.startswith(("false alarm", "bug "))]
    assert not found, found
