"""A loss computed as exactly 0 because rounding absorbed its terms (a saturated softplus,
log(1 + e**z) at z = -97: 1 + 3.7e-44 rounds to 1) has a true derivative of ~1e-43 that no
step can see: its estimate reads exactly 0 with a bound of 0 (eps |f| = 0). A correct
backward must not fail there; a backward that gives a switched-off unit a slope, whose loss
is exactly 0 too, still must.
"""

from __future__ import annotations

import numpy as np

from gradprobe import probe

# Sensor readings fed to one alarm unit whose offset keeps it far below its threshold.
READINGS = np.array([1.0, 2.0])
OFFSET = 100.0


def _saturated(params, inputs):
    z = params["gain"] * inputs["reading"] - OFFSET
    return float(np.sum(np.log(1.0 + np.exp(z))))


def _saturated_grad(params, inputs):
    """d/dz ln(1 + e**z) = e**z / (1 + e**z) (the logistic function; table entry for the
    derivative of ln u with u = 1 + e**z, chain rule; quoted from memory)."""
    z = params["gain"] * inputs["reading"] - OFFSET
    return {"gain": np.array(np.sum(np.exp(z) / (1.0 + np.exp(z)) * inputs["reading"]))}


def _switched_off(params, inputs):
    return float(np.sum(np.maximum(params["gain"] * inputs["reading"] - OFFSET, 0.0)))


def _switched_off_wrong(params, inputs):
    # A unit below its threshold has no slope; this backward passes the reading through anyway.
    return {"gain": np.array(np.sum(inputs["reading"]))}


def _switched_off_right(params, inputs):
    return {"gain": np.array(0.0)}


def _gain():
    return {"gain": np.array(3.0)}


def test_a_loss_exactly_0_by_absorption_is_no_failure():
    params = _gain()
    assert _saturated(params, {"reading": READINGS}) == 0.0  # the premise: absorbed to exactly 0
    g = float(_saturated_grad(params, {"reading": READINGS})["gain"])
    assert 0.0 < g < 1e-40
    report = probe(_saturated, _saturated_grad, params, {"reading": READINGS})
    t = report.tensor("gain")
    assert t.status == "inconclusive", t.status
    assert "exactly 0" in t.inconclusive_reason and "rounding" in t.inconclusive_reason, t.inconclusive_reason
    assert report.ok


def test_a_switched_off_unit_given_a_slope_still_fails():
    report = probe(_switched_off, _switched_off_wrong, _gain(), {"reading": READINGS})
    assert report.tensor("gain").status == "fail"
    assert not report.ok


def test_a_switched_off_unit_without_a_slope_passes():
    report = probe(_switched_off, _switched_off_right, _gain(), {"reading": READINGS})
    assert report.tensor("gain").status == "pass"
