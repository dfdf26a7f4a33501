"""Kinks closer than any step rounding allows, on both sides: the slopes beyond them.

A crop-yield model fitted under an absolute-error loss, its residuals so close to zero that
kinks cut the fertiliser rate's coordinate within 1e-12 of it on both sides: no step that the
loss's rounding allows comes inside them, and every one-sided quotient averages across them.
Beyond them the loss is linear again, and the secant between two steps there is that slope
exactly (what the kinks crossed adds the same to both). With every weight positive the loss is
convex, and the derivative at the point lies between the slopes further left and further
right (a convex function's slopes increase: common practice, any text on convex functions):
the value a kink between those slopes gives.

References: the closed form d|u|/du = sign(u) (the standard table of derivatives), checked
against mpmath's numerical differentiation at 50 digits.
"""

from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe import probe, render_text
from gradprobe.common.status import FAIL, KINK, PASS
from gradprobe.engine.coordinates import check_coordinates
from gradprobe.engine.kink_secants import secant_side

RATE = 2.5
SLOPE = np.array([3.0, -1.0, -3.0, 3.0, -2.0, 1.0, -3.0])  # each residual's change per unit of rate
WEIGHT = np.array([0.05, 0.034, 0.021, 0.04, 0.64, 0.86, 0.31])  # all positive: a convex loss
SCALE = 768.0
# Where each residual crosses zero, as a signed distance from RATE along it: four within
# 2e-12 both ways, the rest from 1e-6 on.
CROWDED = (2.0e-13, -5.0e-13, 4.0e-13, -2.0e-12, 1.0e-6, 3.2e-3, -1.0e-2)


def _residuals(rate: float) -> np.ndarray:
    return -SLOPE * np.array(CROWDED) + SLOPE * (rate - RATE)


def _loss(rate: float) -> float:
    return SCALE * float(np.sum(WEIGHT * np.abs(_residuals(rate))))


def _exact(rate: float = RATE) -> float:
    """d/dr sum(w |res(r)|) = sum(w s sign(res)) (table of derivatives: d|u|/du = sign(u))."""
    return SCALE * float(np.sum(WEIGHT * SLOPE * np.sign(_residuals(rate))))


def _wrong(kind: str, rate: float) -> float:
    r = _residuals(rate)
    if kind == "piece":  # d|u|/du written as (u > 0)
        return SCALE * float(np.sum(WEIGHT * SLOPE * (r > 0)))
    if kind == "dropped":  # the last residual's term left out
        return SCALE * float(np.sum((WEIGHT * SLOPE * np.sign(r))[:-1]))
    return float(kind) * _exact(rate)


def _column(analytic: float):
    p = make_probe(lambda v: _loss(v[0]), np.array([RATE]), np.array([analytic]))
    return check_coordinates(p, np.arange(1))


def _beyond_slopes() -> tuple[float, float]:
    """The loss's slope just beyond the crowded kinks on each side (the closed form there)."""
    return _exact(RATE - 1e-9), _exact(RATE + 1e-9)


def test_the_closed_form_is_mpmath_s_derivative():
    """mpmath's derivative at 50 digits (a central difference far inside the nearest kink's
    distance), at the point and beyond the crowded kinks on both sides."""
    with mp.workdps(50):
        offset = [mp.mpf(float(o)) for o in -SLOPE * np.array(CROWDED)]

        def loss(r):
            return SCALE * sum(mp.mpf(float(w)) * abs(o + mp.mpf(float(s)) * (r - RATE))
                               for w, o, s in zip(WEIGHT, offset, SLOPE))

        for at in (RATE, RATE - 1e-9, RATE + 1e-9):
            numeric = mp.diff(loss, mp.mpf(at), h=mp.mpf(10) ** -30)
            assert abs(float(numeric) - _exact(at)) <= 1e-12 * abs(_exact(at))


def test_secants_beyond_kinks_show_the_slope_there():
    """A loss that moves by D(h) = S h + C beyond kinks within the smallest step (C = -jump *
    distance: a jump of 5 at 2e-10): the secants between steps are S exactly, the kinks are
    seen crossed (the quotients are S + C / h); with C = 0 (no kink crossed) they are not."""
    h = 1e-9 * 2.0 ** np.arange(9)[:, None]
    noise = np.full(h.shape, 1e-20)
    tol = np.array([1e-6])
    for c, crossed in ((-5.0 * 2e-10, True), (0.0, False)):
        side = secant_side(-2.5 * h + c, h, noise, tol)
        assert side.found[0] and side.crossed[0] == crossed
        assert abs(side.slope.value[0] + 2.5) <= 1e-9


def test_convexity_puts_the_value_between_the_slopes_beyond():
    """The fact the verdict rests on, in this loss: left slope <= derivative <= right slope."""
    left, right = _beyond_slopes()
    assert left < _exact() < right


def test_crowded_kinks_on_both_sides_with_the_value_between_the_slopes_beyond_are_a_kink():
    """Kinks within 2e-12 both ways, none resolvable: the secants beyond them show the slopes
    there, and the closed form's value lies between them. Was undecided ("the one-sided
    slopes change at every step ... on both sides")."""
    out = _column(_exact())
    assert out.status[0] == KINK, (out.numeric, out.reasons)
    left, right = _beyond_slopes()
    nearer = left if abs(_exact() - left) <= abs(_exact() - right) else right
    assert abs(out.numeric[0] - nearer) <= 1e-6 * abs(nearer)


@pytest.mark.parametrize("kind", ["-1", "2", "0.5", "dropped"])
def test_a_value_off_the_slopes_beyond_is_never_a_kink_or_a_pass(kind):
    """Sign, factor 2 or 1/2, a term dropped: the values lie off both slopes beyond the kinks
    (checked), and the coordinate is neither a kink nor a pass there."""
    left, right = _beyond_slopes()
    value = _wrong(kind, RATE)
    assert not min(left, right) <= value <= max(left, right)
    out = _column(value)
    assert out.status[0] not in (PASS, KINK), (out.numeric, out.reasons)


@pytest.mark.parametrize("kind", ["1.01", "0.999", "piece", "-1", "dropped"])
def test_a_wrong_backward_there_fails_off_the_point(kind):
    """Between the slopes a wrong value (1% or 0.1% off, d|u|/du written as (u > 0)) is one a
    kink could give at the point: the second look off the point (where the kinks have moved
    away) fails the wrong backward, as it does the values off the slopes."""
    report = probe(lambda p, i: _loss(p["rate"][0]),
                   lambda p, i: {"rate": np.array([_wrong(kind, float(p["rate"][0]))])},
                   {"rate": np.array([RATE])})
    assert report.tensor("rate").status == "fail", render_text(report)


def test_the_correct_backward_is_a_kink_through_the_whole_check():
    report = probe(lambda p, i: _loss(p["rate"][0]),
                   lambda p, i: {"rate": np.array([_exact(float(p["rate"][0]))])},
                   {"rate": np.array([RATE])})
    assert report.tensor("rate").status == "kink", render_text(report)


def test_jumps_in_the_loss_closer_than_any_step_are_not_taken_for_kinks():
    """The same loss plus a step of 40 in its value 1e-13 above the rate and one of -30 1e-13
    below (a loss that jumps, as across a pole, is not continuous there): beyond them the
    secants show the same slopes, but the quotients grow like 1/h as the step shrinks, far
    beyond any slope of the sides' size. The closed form's value is not called a kink on that
    evidence (nor failed)."""
    def jumping(v):
        r = v[0]
        return _loss(r) + 40.0 * (r > RATE + 1e-13) + 30.0 * (r < RATE - 1e-13)

    out = check_coordinates(make_probe(jumping, np.array([RATE]), np.array([_exact()])), np.arange(1))
    assert out.status[0] not in (PASS, KINK, FAIL), (out.numeric, out.reasons)


@pytest.mark.parametrize("seed", [139, 46110, 48063, 48274])
def test_generator_cases_with_kinks_crowding_both_sides_are_decided(seed):
    """kinks-139, -46110, -48063 and -48274 as generated (absolute-error and ReLU residuals,
    kinks 1e-12 .. 1e-8 of the scale around each coordinate of one tensor, some at the
    point): that tensor was undecided; mpmath's gradient (the judge's reference) is the
    code's, and every coordinate is now decided, none failed."""
    from adversarial import judge

    o = judge("kinks", seed)
    assert o["correct"] and o["unverified"] is None and o["crash"] is None
    assert not o["false_alarm"] and not o["inconclusive"], o["status"]


@pytest.mark.parametrize("seed", [47034, 46145, 47109, 47126, 48175])
def test_generator_bugs_beside_such_kinks_still_fail_and_no_wrong_coordinate_is_a_kink(seed):
    """kinks-47034 (a transposed matrix gradient), -46145 and -47109 (a piece's derivative
    wrong), -47126 (a term dropped), -48175 (a factor): tensors with crowded kinks now
    decided as kinks; the planted bug's tensor still fails, and every coordinate given
    `kink` holds the value of the correct backward (which the judge checks against mpmath)."""
    from adversarial import judge
    from adversarial.bugs import make_case
    from adversarial.case import load

    o = judge("kinks", seed)
    assert not o["correct"] and o["unverified"] is None and o["crash"] is None
    assert o["expect_fail"] and o["found"] and not o["missed"] and not o["false_alarm"], o["status"]
    case = make_case("kinks", seed)
    ns, right = load(case), load(case.with_bug(None))
    params, inputs = ns["setup"]()
    with np.errstate(all="ignore"):
        truth, wrong = right["backward"](params, inputs), ns["backward"](params, inputs)
    report = probe(ns["forward"], ns["backward"], params, inputs)
    kinked = [(t.name, k) for t in report.tensors for k in t.kink_indices]
    assert kinked
    for name, k in kinked:
        assert np.asarray(wrong[name])[k] == np.asarray(truth[name])[k], (name, k)
