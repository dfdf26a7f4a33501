"""Kinks at a distance comparable to the step: one-sided slopes down to rounding's floor.

A shop's price fitted under an absolute-error loss, whose residuals sit so close to zero that
kinks cut the price's coordinate at 1e-11, 3e-9, 1e-7 ... of it: every ladder from the usual
first step crosses several, and the estimate does not settle. Between the point and its
nearest kink on a side the loss is linear, and that side's one-sided quotients there are the
derivative. References: the closed form d|u|/du = sign(u) (the standard table of
derivatives), checked against mpmath's numerical differentiation at 50 digits; the adversarial
generator's cases against mpmath through its judge (tests/adversarial).
"""

from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest
from adversarial import judge
from adversarial.bugs import make_case
from adversarial.case import load
from probe_kit import make_probe

from gradprobe import probe, render_text
from gradprobe.common.status import FAIL, INCONCLUSIVE, KINK, PASS
from gradprobe.engine.coordinates import check_coordinates
from gradprobe.engine.verdict import CLOSE_BOTH, CLOSE_NEITHER, CLOSE_ONE

PRICE = 2.5
SLOPE = np.array([3.0, -1.0, -3.0, 3.0, -2.0, 1.0, -3.0])  # the residuals' change per unit of price
WEIGHT = np.array([-0.82, -0.034, -0.051, 0.79, 0.24, -0.66, -0.10])
SCALE = 768.0
# Where each residual crosses zero, as a distance from PRICE along it (signed).
ONE_SIDE = (1.0e-11, -3.0e-9, 1.0e-7, -1.0e-6, 1.6e-6, 3.2e-3, -1.0e-2)  # nearest: 1e-11 above
BOTH_SIDES = (2.0e-9, -3.0e-9, 1.0e-7, -1.0e-6, 1.6e-6, 3.2e-3, -1.0e-2)  # 2e-9 above, 3e-9 below
CROWDED = (2.0e-13, -5.0e-13, 4.0e-13, -2.0e-12, 1.0e-6, 3.2e-3, -1.0e-2)  # within 1e-12 both ways
AT = (0.0, -3.0e-9, 2.0e-9, -1.0e-6, 1.6e-6, 3.2e-3, -1.0e-2)  # one residual exactly 0
AT_AND_CLOSE = (0.0, -1.0e-13, 3.0e-9, -1.0e-6, 1.6e-6, 3.2e-3, -1.0e-2)  # and one 1e-13 below


def _offsets(kinks) -> np.ndarray:
    return -SLOPE * np.array(kinks)


def _loss(kinks):
    offset = _offsets(kinks)
    return lambda price: SCALE * float(np.sum(WEIGHT * np.abs(offset + SLOPE * (price - PRICE))))


def _exact(kinks, price: float = PRICE) -> float:
    """d/dp sum(w |r(p)|) = sum(w s sign(r)) (table of derivatives: d|u|/du = sign(u))."""
    return SCALE * float(np.sum(WEIGHT * SLOPE * np.sign(_offsets(kinks) + SLOPE * (price - PRICE))))


def _wrong(kind: str, kinks, price: float) -> float:
    r = _offsets(kinks) + SLOPE * (price - PRICE)
    if kind == "piece":  # d|u|/du written as (u > 0)
        return SCALE * float(np.sum(WEIGHT * SLOPE * (r > 0)))
    if kind == "dropped":  # one residual's term left out
        return SCALE * float(np.sum((WEIGHT * SLOPE * np.sign(r))[np.arange(r.size) != 3]))
    if kind == "far":  # the nearest residual taken as beyond its kink
        s = np.sign(r)
        s[0] = -s[0]
        return SCALE * float(np.sum(WEIGHT * SLOPE * s))
    return float(kind) * _exact(kinks, price)


def _column(kinks, analytic: float):
    p = make_probe(lambda v: _loss(kinks)(v[0]), np.array([PRICE]), np.array([analytic]))
    return check_coordinates(p, np.arange(1))


@pytest.mark.parametrize("kinks", [ONE_SIDE, BOTH_SIDES, CROWDED, AT, AT_AND_CLOSE])
def test_the_closed_form_is_mpmath_s_derivative(kinks):
    """mpmath's derivative of the loss at 50 digits (a central difference whose step lies far
    inside the nearest kink's distance; at a kink at the point, the sides' mean, which is
    what sign(0) = 0 gives) agrees with the closed form."""
    with mp.workdps(50):
        offset = [mp.mpf(float(o)) for o in _offsets(kinks)]

        def loss(p):
            return SCALE * sum(mp.mpf(float(w)) * abs(o + mp.mpf(float(s)) * (p - PRICE))
                               for w, o, s in zip(WEIGHT, offset, SLOPE))

        numeric = mp.diff(loss, mp.mpf(PRICE), h=mp.mpf(10) ** -30)
    assert abs(float(numeric) - _exact(kinks)) <= 1e-12 * abs(_exact(kinks))


def test_a_kink_closer_than_any_step_on_one_side_is_a_kink():
    """The nearest kink 1e-11 above the price (closer than any step rounding allows), the
    next 3e-9 below: the quotients below agree with the closed form at every step under 3e-9.
    Was undecided: "the numeric estimate does not settle as the step shrinks"."""
    out = _column(ONE_SIDE, _exact(ONE_SIDE))
    assert out.status[0] == KINK, (out.numeric, out.reasons)
    assert abs(out.numeric[0] - _exact(ONE_SIDE)) <= 1e-6 * abs(_exact(ONE_SIDE))


def test_kinks_beyond_the_ladders_but_above_rounding_on_both_sides_pass():
    """Kinks 2e-9 above and 3e-9 below, below every ladder's smallest step: both sides agree
    with the closed form at the steps under them. Was undecided."""
    out = _column(BOTH_SIDES, _exact(BOTH_SIDES))
    assert out.status[0] == PASS, (out.numeric, out.reasons)


@pytest.mark.parametrize("kinks", [ONE_SIDE, BOTH_SIDES])
@pytest.mark.parametrize("kind", ["1.01", "0.999", "-1", "piece", "dropped", "far"])
def test_a_wrong_value_is_never_a_kink_or_a_pass_there(kind, kinks):
    """Wrong by 1% or 0.1%, of sign, with d|u|/du as (u > 0), a term dropped, or the nearest
    residual's sign taken from beyond its kink: not a kink nor a pass at the point, and the
    whole check fails it."""
    out = _column(kinks, _wrong(kind, kinks, PRICE))
    assert out.status[0] not in (PASS, KINK), (out.numeric, out.reasons)
    report = probe(lambda p, i: _loss(kinks)(p["price"][0]),
                   lambda p, i: {"price": np.array([_wrong(kind, kinks, float(p["price"][0]))])},
                   {"price": np.array([PRICE])})
    assert report.tensor("price").status == "fail", render_text(report)


def test_the_point_on_a_kink_of_a_piecewise_linear_loss_is_a_kink():
    """One residual exactly 0 (the others' kinks 3e-9 below and 2e-9 above): both sides are
    seen at the steps under 2e-9, a jump between them at every one, and the closed form's
    value (sign(0) = 0: between the sides) is a kink's. Was undecided."""
    out = _column(AT, _exact(AT))
    assert out.status[0] == KINK, (out.numeric, out.reasons)


@pytest.mark.parametrize("kind", ["1.01", "0.999", "-1", "piece", "dropped"])
def test_a_wrong_value_at_a_kink_at_the_point_fails_off_it(kind):
    """At the point a value between the sides is one a kink gives (the rule at every kink the
    ladders see); the second look off the point fails the wrong backward."""
    report = probe(lambda p, i: _loss(AT)(p["price"][0]),
                   lambda p, i: {"price": np.array([_wrong(kind, AT, float(p["price"][0]))])},
                   {"price": np.array([PRICE])})
    assert report.tensor("price").status == "fail", render_text(report)
    out = _column(AT, _wrong(kind, AT, PRICE))
    assert out.status[0] != PASS, (out.numeric, out.reasons)


def test_a_kink_at_the_point_with_another_closer_than_any_step_says_which_side():
    """A residual exactly 0 and another 1e-13 below: the side above is seen (up to 3e-9),
    the one below never (the second kink lies inside every step rounding allows), and the
    closed form's value (between the sides at the point) is not the side above's: undecided,
    not failed, with the reason naming the unresolved side."""
    out = _column(AT_AND_CLOSE, _exact(AT_AND_CLOSE))
    assert out.status[0] == INCONCLUSIVE, (out.numeric, out.reasons)
    assert out.reasons[0] == CLOSE_ONE


def test_kinks_closer_than_any_step_on_both_sides_say_so():
    """Kinks within 1e-12 of the price both ways: no step rounding allows reaches inside
    them; the closed form's value is not failed, and the reason says what is not resolved."""
    out = _column(CROWDED, _exact(CROWDED))
    assert out.status[0] == INCONCLUSIVE, (out.numeric, out.reasons)
    assert out.reasons[0] == CLOSE_NEITHER


@pytest.mark.parametrize("seed", [40079, 40046, 40058])
def test_generator_cases_with_a_side_clear_of_kinks_are_decided(seed):
    """kinks-40079 p0[1, 1] (kinks 1.07e-11 above, 3.2e-9 below), kinks-40046 p3[0, 0]
    (3e-12 above, 3.1e-9 below) and kinks-40058 (eight coordinates, kinks 1e-15 .. 1e-9
    away) were undecided; mpmath's gradient is the code's."""
    o = judge("kinks", seed)
    assert o["correct"] and o["unverified"] is None and o["crash"] is None
    assert not o["false_alarm"] and not o["inconclusive"], o["status"]


def test_a_generator_case_with_kinks_crowding_both_sides_says_what_is_unresolved():
    """kinks-40005 (ReLU residuals, kinks 2.7e-12 .. 4e-10 around each coordinate, some at
    the point): at the point, every undecided coordinate says which side's derivative no step
    that rounding allows resolves; the second look, passing each of them at both points moved
    off the kinks, makes them kinks (mpmath's gradient, the judge's, is the code's)."""
    case = make_case("kinks", 40005)
    ns = load(case)
    params, inputs = ns["setup"]()
    tp = make_probe(lambda v: ns["forward"]({**params, "p0": v.reshape(params["p0"].shape)}, inputs),
                    params["p0"].reshape(-1), ns["backward"](params, inputs)["p0"].reshape(-1))
    at_point = check_coordinates(tp, np.arange(tp.size))
    undecided = [r for s, r in zip(at_point.status, at_point.reasons) if s == INCONCLUSIVE]
    assert undecided and all(r in (CLOSE_NEITHER, CLOSE_ONE, CLOSE_BOTH) for r in undecided), undecided
    assert FAIL not in at_point.status
    report = probe(ns["forward"], ns["backward"], params, inputs)
    t = report.tensor("p0")
    assert t.status == "kink" and t.failed == 0 and t.inconclusive == 0, render_text(report)
    assert len(t.kink_indices) >= len(undecided)
