"""A kink closer to the point than rounding noise lets any two-sided step reach, beside a loss
so large that its rounding hides the kink's side: a wrong gradient there must still fail.

The scenario: a water utility's cost model. A 0-d param `level` (a reservoir's target level)
enters through a shortfall penalty relu(slope * (level - trigger)) whose trigger sits 1.8e-5
from the level, and a storage term of exp pieces makes the loss ~2.5e10, so that its rounding
(~1e-5 per call) drowns every step shorter than the kink's distance. The side away from the
kink is clean far beyond the point and shows the derivative; the side across it is flat.

References: the derivatives of relu(u) (1 for u > 0, 0 below), exp(u) (itself) and tanh(u)
(1 - tanh(u)**2) are common practice (from memory); the level's derivative at the point is
checked against mpmath's numerical differentiation at 40 digits, and the generator's case by
its judge (mpmath).
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

SLOPE, TRIGGER, WEIGHT = -5.602566074383536, 0.21269839915845476, 0.5680933820214695
RATES = np.array([0.10183235, 0.09310691, 0.07645075, 0.07129439])
SHIFTS = np.array([-208.39764355, -304.78748556, 325.84433374, 527.95368677])
WEIGHTS = np.array([0.96399684, 0.37363196, -0.13379256, 0.58022907])  # per storage tank
SCALE = 0.044742763521073196
GATE_RATE, GATE_SHIFT, GATE_WEIGHT = -2.01422538, -0.06949247, -0.61777597


def _params():
    return {"level": np.array(0.21267996826069882),
            "storage": np.array([-19.34607419, -3.75249373, -1.71303981, -2.31297941]),
            "gate": np.array([-0.31881234])}


def forward(p, i):
    shortfall = WEIGHT * np.maximum(SLOPE * (p["level"] - TRIGGER), 0.0)
    storage = np.sum(WEIGHTS * np.exp(RATES * (p["storage"] - SHIFTS)))
    gate = np.sum(GATE_WEIGHT * np.tanh(GATE_RATE * (p["gate"] - GATE_SHIFT)))
    return float(SCALE * (shortfall + storage + gate))


def backward(p, i, sign=1.0):
    u = SLOPE * (p["level"] - TRIGGER)
    return {"level": np.asarray(sign * SCALE * WEIGHT * SLOPE * float(u > 0)),
            "storage": SCALE * WEIGHTS * RATES * np.exp(RATES * (p["storage"] - SHIFTS)),
            "gate": SCALE * GATE_WEIGHT * GATE_RATE * (1 - np.tanh(GATE_RATE * (p["gate"] - GATE_SHIFT)) ** 2)}


def _level_derivative_mpmath():
    def f(t):
        u = mpmath.mpf(SLOPE) * (t - mpmath.mpf(TRIGGER))
        return mpmath.mpf(SCALE) * mpmath.mpf(WEIGHT) * (u if u > 0 else 0)

    with mpmath.workdps(40):
        return float(mpmath.diff(f, mpmath.mpf(float(_params()["level"])), h=mpmath.mpf("1e-12")))


def test_the_backward_is_mpmaths_derivative_at_the_point():
    exact = _level_derivative_mpmath()
    assert exact == pytest.approx(float(backward(_params(), {})["level"]), rel=1e-12)
    assert exact < -0.1  # the point is on the ramp's rising side, 1.8e-5 from its corner


def test_a_sign_flip_beside_the_kink_fails_off_the_point():
    """At the point the sides are -0.142 and 0 and the flipped value +0.142 lies outside both,
    yet several kinks meeting there could give it: not failed there. Off the point, where the
    kink lies beyond the steps that beat the noise, the code's value is the wrong sign."""
    flipped = lambda p, i: backward(p, i, sign=-1.0)  # noqa: E731
    t = probe(forward, flipped, _params(), {}).tensor("level")
    assert t.status == "fail"
    assert t.details[0].reason is not None and "moved" in t.details[0].reason


def test_the_correct_backward_is_not_failed():
    t = probe(forward, backward, _params(), {})
    assert all(x.status != "fail" for x in t.tensors), [(x.name, x.status) for x in t.tensors]


def test_the_generators_case_fails():
    """shapes-49038 as generated: the same shape of case with a sign bug on its 0-d param;
    the judge's reference is mpmath."""
    from adversarial import judge

    o = judge("shapes", 49038)
    assert o["bug"] == "sign" and o["crash"] is None and o["unverified"] is None
    assert o["found"] and not o["missed"] and not o["false_alarm"], o["status"]


def test_several_kinks_meeting_at_the_point_are_not_failed():
    """|h| written as 3h - 2 relu(h) + 4 relu(-h) at h = 0 exactly, beside the same large
    storage term: the sides are -1 and +1 (times the weights) and the usual convention
    (relu'(0) = 0, common practice) gives 3, outside them, yet correct. Off the point the code
    is right on both sides, so no move fails it (README's example of such a sum)."""
    def fwd(p, i):
        h = p["level"] - TRIGGER
        corner = 3 * h - 2 * np.maximum(h, 0.0) + 4 * np.maximum(-h, 0.0)
        storage = np.sum(WEIGHTS * np.exp(RATES * (p["storage"] - SHIFTS)))
        return float(SCALE * (10 * WEIGHT * corner + storage))

    def bwd(p, i):
        h = float(p["level"] - TRIGGER)
        d = 3 - 2 * float(h > 0) - 4 * float(h < 0)
        return {"level": np.asarray(SCALE * 10 * WEIGHT * d),
                "storage": SCALE * WEIGHTS * RATES * np.exp(RATES * (p["storage"] - SHIFTS))}

    params = {"level": np.array(TRIGGER), "storage": _params()["storage"]}
    with mpmath.workdps(40):
        x0 = mpmath.mpf(TRIGGER)
        corner = lambda t: 3 * (t - x0) - 2 * max(t - x0, 0) + 4 * max(x0 - t, 0)  # noqa: E731
        sides = [float(mpmath.diff(corner, x0 + s * mpmath.mpf("1e-20"), h=mpmath.mpf("1e-30"))) for s in (-1, 1)]
    assert sides == [pytest.approx(-1.0), pytest.approx(1.0)]  # the sum is |h| (mpmath)
    t = probe(fwd, bwd, params, {})
    assert t.tensor("level").status != "fail", t.tensor("level").details
