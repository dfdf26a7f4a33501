"""The point itself on a kink, with more kinks closer than the ladders' steps (jump_at_point.py).

A sum of ReLU units along one coordinate c whose residuals sit at every decade of distance
from the point, three exactly at 0 (kinks-850997 of the adversarial generator: four kinks
within 2e-11 to 6e-11 of the point, three within 2e-9 to 3e-9, and so on up). The derivative of each unit is the step function's, taken as 0 at
0 (common practice for ReLU); the loss's one-sided derivatives at the point are the sums
over the units that are on just right and just left of it, which the tests compute from the
residuals directly (a piecewise-linear loss: no table needed). The ladders' steps, which stop
near 1e-9 where the loss's rounding allows, read slopes beyond the close kinks (about 5.9),
far from the correct 0.614; the value lies between the sides at the point (-0.202, 6.141).
"""

from __future__ import annotations

import numpy as np
import pytest

import gradprobe

C0 = 145.0
# Residuals at every decade of distance from the point, 0 included (kinks-850997's p0[2, 0]).
W = np.array([-0.6971157119419578, 0.7862180444920102, -0.43007897613428736, -0.015204226229226236,
              -0.9521293498297314, -0.48042144010210874, 0.22954444786010564, 0.38957226676031964,
              -0.6607991972916145, 0.4299297043385333, -0.05780150956034458, 0.5129598639100497,
              -0.2781076404811875, -0.37093192049674406, 0.21470173188730457, 0.18234253057974792,
              0.6281030545500701, -0.9383281484375685, 0.4069226075669108, 0.43264028512693375,
              0.7135316903114475, -0.5743371285469545])
X = np.array([-3.0, 2.0, -1.0, 2.0, 1.0, 2.0, 3.0, 3.0, -2.0, -1.0, -2.0, 3.0, 1.0, -1.0, -2.0, -3.0, -2.0,
              -3.0, 3.0, -3.0, -1.0, -2.0])
E = np.array([0.0, -6.4e-09, -6.4e-11, 0.0, 6.4e-02, -6.4e-09, 6.4e-09, 6.4e-04, -6.4e-04, 6.4e-03, -6.4e-11,
              -6.4e-03, 0.0, 6.4e-01, 6.4e-11, -6.4e-02, 6.4e-06, -6.4e-06, 6.4e-07, 6.4e-11, -6.4e-07, 6.4e-03])
SCALE = 2.643141746829894


def _z(c):
    return X * (c - C0) + E


def forward(params, inputs):
    z = _z(params["c"][0])
    return float(SCALE * np.sum(W * np.maximum(z, 0.0)) + 0.5 * np.sum(params["v"] ** 2))


def _backward(shift=0.0, factor=1.0):
    def backward(params, inputs):
        z = _z(params["c"][0])
        g = SCALE * np.sum(W * X * (z > 0))
        return {"c": np.array([factor * g + shift]), "v": params["v"].copy()}
    return backward


def _params():
    return {"c": np.array([C0]), "v": np.array([0.3, -1.2])}


def _sides():
    z = E
    right = SCALE * np.sum(W * X * ((z > 0) | ((z == 0) & (X > 0))))
    left = SCALE * np.sum(W * X * ((z > 0) | ((z == 0) & (X < 0))))
    return right, left


def test_the_pattern_puts_the_value_between_the_sides_and_the_ladders_beyond_them():
    right, left = _sides()
    value = SCALE * np.sum(W * X * (E > 0))
    assert right == pytest.approx(-0.2019, abs=1e-3) and left == pytest.approx(6.1413, abs=1e-3)
    assert min(right, left) < value < max(right, left)
    # the secants at a step the ladders use (1e-7) read neither side
    f = lambda h: forward({"c": np.array([C0 + h]), "v": np.zeros(2)}, {})  # noqa: E731
    central = (f(1e-7) - f(-1e-7)) / 2e-7
    assert abs(central - value) > 1.0


def test_correct_code_with_the_point_on_a_kink_is_no_failure():
    report = gradprobe.probe(forward, _backward(), _params(), {})
    assert report.tensor("c").status == "kink", report.tensor("c")
    assert report.tensor("v").status == "pass"


@pytest.mark.parametrize(("shift", "factor"), [(7.0, 1.0), (-1.5, 1.0), (0.0, 1.3)],
                         ids=["above-both-sides", "below-both-sides", "factor-1.3"])
def test_a_wrong_value_still_fails(shift, factor):
    """Outside the sides at the point: no kink allows it; a factor bug lies between them at
    the point but not at the second look's moved point."""
    report = gradprobe.probe(forward, _backward(shift, factor), _params(), {})
    assert report.tensor("c").status == "fail", report.tensor("c")


def test_the_caller_s_params_are_unchanged():
    params = _params()
    gradprobe.probe(forward, _backward(), params, {})
    assert params["c"][0] == C0 and np.array_equal(params["v"], [0.3, -1.2])
