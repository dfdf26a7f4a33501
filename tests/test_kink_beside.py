"""A bend far narrower than gradprobe's first steps, lying a little beside the point: the
ladder's quotients on the far side keep changing while the near side settles. The near side
is the derivative here unless the bend sits at the point itself; a pair at a step below the
bend's distance tells (engine/lopsided.py).

Scenario: irrigation valves whose flow switches on sharply, softplus(s (x - k)) / s with
s = 1.2e10 per unit opening, each valve set 3.5e-8 to 6e-8 past its switch point (so the
flow's derivative there is sigmoid(s (x - k)) = 1 to double precision, the valve fully on;
the ladder's smallest steps, 3e-8 and 1.5e-8, lie below the switch on the valve's side). A
backward that takes the sigmoid of the unscaled argument (sigmoid(x - k) = 0.5: the wrong
piece) gives half the slope, a value between the two sides of the bend, once reported as a
kink.

Reference: mpmath.diff at 40 digits of the same loss (the softplus written as
log(1 + exp(t)), no table needed), and the closed form d/dt log(1 + e^t) = 1 / (1 + e^-t)
(the logistic function; standard table of derivatives, from memory) checked against it.
"""

from __future__ import annotations

import mpmath
import pytest
import numpy as np

from gradprobe import probe

SHARP = 1.2e10
RNG = np.random.default_rng(20087)
X = RNG.uniform(0.005, 0.015, size=4)
K = X - np.array([4e-8, 5e-8, 3.5e-8, 6e-8])  # each switch point 3.5-6e-8 below its valve
W = RNG.uniform(0.5, 1.5, size=4)


def _sigmoid(t):
    return 0.5 * (1 + np.tanh(0.5 * t))


def forward(p, i):
    return float(np.sum(i["w"] * np.logaddexp(0, SHARP * (p["x"] - i["k"])) / SHARP))


def right(p, i):
    return {"x": i["w"] * _sigmoid(SHARP * (p["x"] - i["k"]))}


def wrong_piece(p, i):
    return {"x": i["w"] * _sigmoid(p["x"] - i["k"])}


def mp_derivative(j):
    with mpmath.workdps(40):
        k, w, s = mpmath.mpf(float(K[j])), mpmath.mpf(float(W[j])), mpmath.mpf(SHARP)
        def loss(t):
            return w * mpmath.log(1 + mpmath.exp(s * (t - k))) / s
        return float(mpmath.diff(loss, mpmath.mpf(float(X[j]))))


def _run(backward):
    return probe(forward, backward, {"x": X.copy()}, {"k": K, "w": W}).tensor("x")


def test_the_closed_form_is_mpmaths_and_the_wrong_piece_is_half_of_it():
    g = right({"x": X}, {"k": K, "w": W})["x"]
    bad = wrong_piece({"x": X}, {"k": K, "w": W})["x"]
    for j in range(X.size):
        assert abs(g[j] - mp_derivative(j)) <= 1e-9 * abs(g[j])
        assert abs(bad[j] / g[j] - 0.5) < 1e-6
    # the bend is far narrower than the first step gradprobe takes (6e-6 |x| at least)
    assert 20 / SHARP < 1e-3 * np.cbrt(np.finfo(float).eps)


def test_a_derivative_from_the_wrong_piece_fails_with_the_derivative_mpmath_gives():
    t = _run(wrong_piece)
    assert t.status.value == "fail" and len(t.bad_indices) == X.size
    for d in t.details:
        truth = mp_derivative(d.index[0])
        assert abs(d.numeric - truth) <= 3 * d.error_estimate < abs(truth) / 10


def test_the_right_derivative_passes():
    assert _run(right).status.value == "pass"



# Valves set 1e-9 to 2e-9 from their switch points, some just on, some just off, beside a
# reservoir level of 5e3 in the loss (its rounding, 1e-12, keeps every step of the ladder
# above the bend's distance): the far side's quotients never leave the bend behind; the pair
# far below the ladder alone shows the loss smooth at the point with the near side's slope.
K_CLOSE = X - np.array([1.5e-9, -2e-9, 1e-9, -1.2e-9])
LEVEL = 5e3


def _with_level(p, i):
    return forward(p, i) + LEVEL


def _run_close(backward):
    return probe(_with_level, backward, {"x": X.copy()}, {"k": K_CLOSE, "w": W}).tensor("x")


def _mp_close(j):
    with mpmath.workdps(40):
        k, w, s = mpmath.mpf(float(K_CLOSE[j])), mpmath.mpf(float(W[j])), mpmath.mpf(SHARP)
        return float(mpmath.diff(lambda t: w * mpmath.log(1 + mpmath.exp(s * (t - k))) / s,
                                 mpmath.mpf(float(X[j]))))


def test_a_wrong_piece_beside_a_bend_closer_than_every_step_fails():
    i = {"k": K_CLOSE, "w": W}
    g, bad = right({"x": X}, i)["x"], wrong_piece({"x": X}, i)["x"]
    for j in range(X.size):
        assert abs(g[j] - _mp_close(j)) <= 1e-6 * W[j]  # on: w, off: 0, to mpmath's digits
    assert np.all(np.abs(bad - 0.5 * W) < 1e-6)  # half the on-slope, on and off alike
    t = _run_close(wrong_piece)
    assert t.status.value == "fail" and len(t.bad_indices) == X.size, (t.status, t.bad_indices)
    # The level's rounding (bounds near 0.1 below the bend's distance) leaves the pair far below
    # the ladder unable to rule out kinks at the point: the second look, off it, fails them.
    for d in t.details:
        assert "moved off the kinks" in d.reason, d.reason


def test_the_right_derivative_beside_a_bend_closer_than_every_step_is_no_failure():
    # Below the bend's distance the level's rounding leaves bounds near 0.1 on slopes of 1:
    # no step resolves the threshold there, so an honest verdict is inconclusive at best.
    t = _run_close(right)
    assert t.status.value != "fail", t.bad_indices


def test_the_generator_s_bend_closer_than_every_step_is_found():
    """steep-87786: softplus(1e4 u) / 1e4, u = a (p - k) with a ~ 1e7 (a bend 1e-11 wide)
    1.7e-9, 5e-10 and 7.5e-10 beside the point, the sigmoid taken of u / 1e4 instead.
    Reference: mpmath, through the adversarial generator's judge (50 digits)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 87786)
    assert o["found"] and not o["false_alarm"], (o["status"], o["expect"])


def test_relu_kinks_meeting_at_the_point_with_jumps_that_nearly_cancel_are_no_failure():
    """kinks-49059: ReLU residuals exactly 0 in three rows whose jumps (1.1, 1.3 and 0.26, of
    both signs) leave a net jump of 0.39 at the point, one more kink 1.7e-11 beside it: the
    per-kink convention's value lies off both sides, and a pair far below the ladder sees a
    gap within three of its rounding bounds. The backward is correct (mpmath, through the
    generator's judge), so no tensor may fail."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 49059)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_relu_ties_within_the_tiny_step_are_no_failure():
    """kinks-111135: one ReLU residual exactly 0, another 9.8e-16 from 0 (4,400 spacings of
    x, closer than the pair far below the ladder may go), jumps 0.86 and -1.84: the tiny
    pair's quotients agree to one bound of their rounding, yet no closer than 3% of the
    value's distance from the settled side. Correct backward (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 111135)
    assert not o["false_alarm"], (o["status"], o["expect"])


@pytest.mark.parametrize("seed", [110040, 110191, 110759, 140045])
def test_a_settled_side_beside_kinks_closer_than_its_steps_is_no_failure(seed):
    """kinks-110040/110191/110759/140045: absolute values and ReLUs with residuals exactly 0 and
    others 1e-16 to 1e-13 beside them (closer than any step), one side of the ladder settled
    at the slope beyond them. That side is not the derivative at the point: the pair far below
    the ladder shows it (its quotient leaves the side) or cannot rule out kinks within it
    whose jumps cancel; on every ladder, the ones further down and between the levels too
    (kinks-140045: two ReLUs at the point, the ladder between the levels settled on the
    right). Correct backwards (mpmath, through the generator's judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", seed)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_kinks_cancelling_at_one_tiny_step_by_chance_are_no_failure():
    """kinks-130108: an absolute value's corner at the point (jump 0.014) and another 8e-12
    beside it, partly crossed by the tiny step (0.023 of jump): at that step the two nearly
    cancel (a gap of 4e-5, within 1% of the value's distance from the settled side); at a step
    four times wider they do not. Correct backward (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 130108)
    assert not o["false_alarm"], (o["status"], o["expect"])


@pytest.mark.parametrize("seed", [150306, 150681])
def test_a_clean_side_is_no_derivative_where_the_tiny_step_cannot_rule_out_a_kink_at_the_point(seed):
    """kinks-150306: ReLU residuals exactly 0 in six rows, the tiny step's own sides apart
    (a kink at the point, several meeting there); kinks-150681: a loss of -1e5 whose tiny
    step's rounding (bounds of 101) could not show a jump of the value's distance from the
    clean side (453). Correct backwards (mpmath, through the generator's judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", seed)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_kink_beside_the_point_cancelling_kinks_at_it_at_the_tiny_step_is_no_failure():
    """kinks-221142: ReLU residuals exactly 0 in four rows (a net jump of 0.00138 at the
    point) and one 3.1e-14 beside it (a jump of -0.00166), which the tiny step (1.3e-13)
    crosses three quarters of: its two quotients agree (a gap of 1e-4 within its rounding of
    9e-5) and look like the clean side's, yet at a step four times wider they part. The
    correct value (0.009906, between the left side 0.009143 and the right side at the point
    0.01052) once failed on the clean side. Correct backward (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 221142)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_side_decided_alone_after_the_ladders_is_no_derivative_at_a_kink_at_the_point():
    """kinks-240855: an absolute value's residual at 0 (a kink at the point) and another
    1e-10 beside it on the right, beyond which the right side's quotients settle only far
    out; each side taken apart at the end decided on the left alone (-1.0729) and failed a
    correct -1.7070 (the subgradient's midpoint of -1.0729 and the right side at the point,
    -2.3412). Correct backward (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 240855)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_tiny_step_reading_both_sides_alike_is_borne_out_at_a_wider_one():
    """kinks-340214: ReLU ties at the point along p2[2, 3], the sides -0.00867 and -0.00726 at
    every step from 2.3e-13 up to the kinks beside it; the tiny step (2.8e-14, a few thousand
    spacings of x) read both as -0.00588, and its central quotient failed a correct -0.00674
    (several kinks meeting at the point give it). Correct in p2 (mpmath, through the judge);
    the planted bug in p1 still fails."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 340214)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["found"], o["status"]


def test_a_settled_side_with_no_room_for_a_tiny_step_fails_nothing():
    """kinks-300980: params near 300 (a spacing of 5.7e-14), a ReLU residual tie at the point
    and kinks 1e-10 to 1e-8 beside it on the right; the left side settles (-0.000653) at a
    ladder whose smallest step is 7.5e-9, and no tiny step fits between 2**13 spacings of x
    and that step over 16. The correct value (0.00178, the right side's slope at the point)
    once failed on the left side. Correct backward (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 300980)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_value_between_the_sides_of_a_kink_beside_the_point_is_judged_by_the_clean_side():
    """kinks-250047: a Huber residual 1.25e-5 past its corner (z = 1.0000125), every ladder step
    beyond the corner: the left side settles on the true slope (-197.91199), the right on the
    other piece's (-197.9144). The planted bug takes z for the clipped residual and gives
    -197.91446, between the sides: once reported as a kink. The tiny step and one four times
    wider show the loss smooth with the left side's slope (the wider to within 1% of the
    value's distance from it), so the clean side judges, and the bug fails (mpmath, through
    the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 250047)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["found"] and not o["missed"], (o["status"], o["expect"])


def test_the_second_tiny_pair_is_taken_at_another_step_where_the_first_sits_at_the_top_of_its_room():
    """kinks-381008: an absolute value's residual at 0 (a jump of -44) and another kink about
    2e-10 beside it on the right; the tiny step sat at the top of its room (the ladder's
    smallest over 16, 9.3e-10), where the two kinks nearly cancel (-38.999 against the left
    side's -38.988), and the pair meant to be four times wider was capped at the same step.
    It is now taken four times narrower there (2.3e-10: -39.9), and the correct -60.96 (the
    sides' midpoint at the point) is not failed on the left side. Correct backward (mpmath,
    through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 381008)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_bend_beside_the_point_with_a_coarse_tiny_step_still_fails_a_wrong_factor():
    """steep-440226: softplus of sharpness 1e4, its bend beside the point; the left side
    settles on -1198.0052 while the right crosses the bend. The planted factor (1.01) gives
    -1209.99, within the values several kinks at the point could give (0 to left + right), so
    a kink unless a tiny step shows the loss smooth there. The tiny step sits at the floor of
    its room (a few thousand spacings of a small x) with a rounding of 0.2, above 1% of the
    value's distance from the side (0.12); the pair four times wider resolves it (0.05), and
    the settled side fails the value (mpmath, through the judge)."""
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 440226)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["found"] and not o["missed"], (o["status"], o["expect"])
