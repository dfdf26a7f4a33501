"""Kinks at the point with another closer than any step that rounding noise allows.

An absolute-error loss whose residuals sit exactly at 0 and 6.25e-14 from 0 along one
coordinate (kinks-27036's column): every step the loss's rounding allows is wider than the
second kink's distance, so both one-sided quotients average across it, and the sides the
steps see are not the one-sided derivatives at the point. The value a correct gradient takes
there lies outside those sides (d|u|/du = sign(u), 0 at u = 0: the closed form from the table
of derivatives; mpmath agrees through the adversarial generator's judge). Such a value is
not failed on the sides' evidence; a second look off the point decides, and fails code that
is wrong there too.
"""

from __future__ import annotations

import numpy as np
from adversarial import judge
from probe_kit import make_probe

from gradprobe import probe, render_text
from gradprobe.common.status import FAIL
from gradprobe.engine.coordinates import check_coordinates

X0 = 0.0908203125  # the unit price a shop's demand model sits at
SLOPE = np.array([0, 2, 3, -2, -1, -1, -3, 1, -3, 3, -2, 0, 3, 1], dtype=float)
OFFSET = np.array([-5.6e-2, -8.4e-2, -4.5e-3, -3.6e-2, 6.25e-14 / 3, -9.8e-2, 6.4e-2, -2.8e-2, -2.4e-2,
                   2.8e-2, 3.2e-2, 3.0e-2, -2.0e-2, 0.0]) * 3.0  # residuals 0 and 6.25e-14 from a kink
WEIGHT = np.array([0.798, 0.792, -0.932, 0.507, -0.559, -0.911, -0.077, -0.464, 0.414, -0.427, -0.270, 0.589,
                   0.864, 0.859])
SCALE = 363.46


def _residuals(price: float) -> np.ndarray:
    return OFFSET + SLOPE * (price - X0)


def _exact(price: float) -> float:
    """d/dp sum(w |r(p)|) = sum(w s sign(r)) (table of derivatives: d|u|/du = sign(u), 0 at 0)."""
    return SCALE * float(np.sum(WEIGHT * SLOPE * np.sign(_residuals(price))))


def _column(analytic: float):
    probe_ = make_probe(lambda v: 53000.0 + SCALE * float(np.sum(WEIGHT * np.abs(_residuals(v[0])))),
                        np.array([X0]), np.array([analytic]))
    return check_coordinates(probe_, np.arange(1))


def test_kinks_closer_than_the_tiny_step_do_not_fail_the_closed_form_value():
    """Once failed: numeric 79.598 +- 0.0033 (the right side, across both kinks) against the
    closed form's 173.73, which lies outside the sides (-138.5 and 79.6)."""
    out = _column(_exact(X0))
    assert out.status[0] != FAIL, (out.numeric, out.error_estimate)
    assert out.reasons[0]


def _demand(backward):
    return probe(lambda p, i: 53000.0 + SCALE * float(np.sum(WEIGHT * np.abs(OFFSET + SLOPE * (p["price"][0] - X0)))),
                 backward, {"price": np.array([X0])})


def test_the_correct_backward_is_not_failed_and_a_dropped_term_still_is():
    """Through the whole check: the code's d|u|/du = sign(u) is not failed; the same code with
    one residual's term dropped (wrong at the point and off it) fails, off the point."""
    def right(p, i):
        return {"price": np.array([_exact(float(p["price"][0]))])}

    def dropped(p, i):
        r = OFFSET + SLOPE * (p["price"][0] - X0)
        keep = np.arange(r.size) != 2
        return {"price": np.array([SCALE * float(np.sum((WEIGHT * SLOPE * np.sign(r))[keep]))])}

    good = _demand(right)
    assert good.tensor("price").status != "fail", render_text(good)
    bad = _demand(dropped)
    assert bad.tensor("price").status == "fail", render_text(bad)


def test_the_case_as_first_found_is_no_false_alarm():
    """kinks-27036 as generated: p2[1, 3] (mpmath 174.2 = the code's; numeric 79.66 +- 0.0033
    across the kink 6.25e-14 away) was failed; no tensor is failed now."""
    o = judge("kinks", 27036)
    assert o["correct"] and not o["unverified"] and o["crash"] is None and not o["own_warnings"]
    assert not o["false_alarm"], (o["status"], o["expect"])
