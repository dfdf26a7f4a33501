"""Coordinates certified on their first pair keep real bounds: errors just beyond the
threshold still fail, also where the loss's rounding is comparable to the tolerance.

Reference: d/dx sin(x) = cos(x) and d/dx exp(kx) = k exp(kx) (tables of derivatives, e.g.
Abramowitz & Stegun 4.3.105 and 4.2.1 with the chain rule).
"""

from __future__ import annotations

import numpy as np

from gradprobe import probe

RNG = np.random.default_rng(11)
W = RNG.normal(size=500)
C = RNG.uniform(0.5, 2.0, size=500)
OFF = RNG.choice(500, size=10, replace=False)


def forward(p, i):
    return float(np.sum(i["c"] * np.sin(p["w"])) + i["offset"])


def _backward(rel):
    def backward(p, i):
        g = i["c"] * np.cos(p["w"])
        g[OFF] *= 1 + rel
        return {"w": g}
    return backward


def test_errors_three_thresholds_off_fail_where_the_rest_is_certified():
    report = probe(forward, _backward(3e-6), {"w": W}, {"c": C, "offset": 0.0})
    t = report.tensor("w")
    assert t.status == "fail"
    assert {i[0] for i in t.bad_indices} == set(OFF.tolist())


def test_with_rounding_near_the_tolerance_errors_still_fail():
    # A large constant in the loss: its rounding, over the first step, is a tenth of the tolerance or more.
    inputs = {"c": C, "offset": 300.0}
    report = probe(forward, _backward(5e-6), {"w": W}, inputs)
    t = report.tensor("w")
    assert t.status == "fail" and {i[0] for i in t.bad_indices} == set(OFF.tolist())
    assert probe(forward, _backward(0.0), {"w": W}, inputs).ok


def test_steep_coordinates_are_not_certified_by_a_gentler_sample():
    k = np.full(500, 0.5)
    k[OFF] = 40.0  # far steeper: their truncation at the first step dwarfs the others'
    x = 0.1 * W

    def f(p, i):
        return float(np.sum(np.exp(k * p["w"])))

    def wrong(p, i):
        g = k * np.exp(k * p["w"])
        g[OFF] *= 1 + 3e-6
        return {"w": g}

    report = probe(f, wrong, {"w": x})
    assert {i[0] for i in report.tensor("w").bad_indices} == set(OFF.tolist())
    assert probe(f, lambda p, i: {"w": k * np.exp(k * p["w"])}, {"w": x}).ok
