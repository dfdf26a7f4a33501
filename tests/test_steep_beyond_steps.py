"""Steep features far narrower than the steps: a bound is used only where the rows it rests on
show the loss in its Taylor range.

- steep-73003 (correct): sines of frequency 1.5e6 to 2.2e6 in p2 beside a loss of 7.9e29 (one
  unit in its last place is 1.4e14). Steps of 1e-4 to 8e-6 straddle many periods: the loss
  moves by the sines' amplitude, about 1e16, at every step, and the quotients are that over
  the step. The sides' mean read as 8.5e19 +- 2.1e21 against a true (and analytic) -1.85e22.
  No step resolves the threshold there (an error of 1e-6 moves the loss by 1e10 over the
  sine's smooth radius of 6.5e-7, far below its rounding), so the verdict may be
  inconclusive, never fail.
- steep-73014 (buggy: p0's gradient left out, all 0): 1/(1 - u) with its pole 1.4e-9 from
  p0[1, 0, 0] (true derivative -2.95e15, mpmath). The first pair's step of 2.4e-4 jumps the
  pole: both sides fall by the pole's term (4.1e6), their slopes +-1.7e10 and the central
  quotient 7e4, a hundredth of the tolerance from the analytic 0; it passed. The bug moves
  the loss by 4e6 over the pole's distance, 1e4 times its rounding: it must fail.
- steep-73224 (correct, found on a fresh seed range): sines of amplitude 0.03 and period
  1e-4 in p0 beside a loss of 4.4e12. The chain of steps judged on the rounding measured
  along the coordinate (0.07, the sines' ripple within it) moved the loss by less than two
  such roundings at every step from 2.4e-4 to 3.1e-2 and read 0.3 +- 15 against a true and
  analytic -924. No step resolves the threshold there either: never fail.
- steep-89576, steep-87818 (correct, fresh seed ranges): sines whose amplitude is one to two
  roundings of the loss, beneath the steps of the ladder between the 16-fold levels; its rows
  moved the loss by 1 to 2.3 roundings at every step from 3.8e-6 to 6.1e-5, and read 5e6 +-
  2.4e7 against a true 1.98e8 (89576). Never fail.
- steep-87144 (correct, fresh seed range): sines of smooth radius 1e-2 beside a loss of
  2.1e26; the chain judged on the rounding measured along p2[1] ran from steps of 0.06 to 8,
  its moves 2e11 to 9e11 at every step (no larger 128 times wider), and read 1.4e11 +- 4.5e11
  against a true 2.56e13. Never fail.

Reference: mpmath at 50 digits through the adversarial generator (tests/adversarial: every
piece's derivative from the standard tables, checked against mpmath's own differentiation of
the loss), which also decides what a correct gradient may be called (run.expectations).
"""

from __future__ import annotations

import pytest


def _judged(seed: int) -> dict:
    from adversarial import judged_cleanly

    return judged_cleanly("steep", seed)


# Correct targets (seed, the tensor the steep feature is in), each once failed: a sine far finer
# than the steps (73003), sines moving the loss within its measured rounding (73224), sines of a
# few roundings beneath the steps (89576, 87818), a chain on measured rounding beyond the sines'
# scale (87144). No step resolves the threshold on them: pass or inconclusive, never fail.
CORRECT = ((73003, "p2"), (73224, "p0"), (89576, "p1"), (87818, "p0"), (87144, "p2"))


@pytest.mark.parametrize("seed, tensor", CORRECT, ids=[f"steep-{s}" for s, _ in CORRECT])
def test_a_steep_feature_beneath_the_steps_is_no_failure(seed, tensor):
    o = _judged(seed)
    assert o["correct"] and o["expect"][tensor] == "quiet"
    assert not o["false_alarm"], (seed, o["status"])
    assert o["status"][tensor] in ("pass", "inconclusive"), (seed, o["status"])


def test_a_gradient_left_out_beside_a_pole_closer_than_the_first_step_fails():
    o = _judged(73014)
    assert not o["correct"] and o["expect"]["p0"] == "fail"
    assert o["found"] and not o["missed"], o["status"]
    assert o["status"]["p0"] == "fail" and not o["false_alarm"], o["status"]


def test_the_pole_s_coordinate_carries_mpmath_s_derivative():
    """The failure is decided at the point, on steps inside the pole's distance: its numeric
    value is mpmath's derivative within its bound."""
    import numpy as np

    import gradprobe
    from adversarial import make_case
    from adversarial.case import load
    from adversarial.reference import reference

    case = make_case("steep", 73014)
    truth = reference(case).grads["p0"].reshape(-1)
    ns = load(case)
    params, inputs = ns["setup"]()
    t = gradprobe.probe(ns["forward"], ns["backward"], params, inputs).tensor("p0")
    near = int(np.argmax(np.abs(truth)))
    mine = [d for d in t.details if np.ravel_multi_index(d.index, params["p0"].shape) == near]
    assert len(mine) == 1 and mine[0].status.value == "fail" and mine[0].reason is None, mine
    assert abs(mine[0].numeric - truth[near]) <= 3 * mine[0].error_estimate, (mine[0], truth[near])


def test_no_warning_leaks_from_the_rounding_measured_along_a_coordinate():
    """steep-73406: a loss of 2.6e26 over an analytic slope of 0 (floored at 1e-300) made the
    measured rounding's move overflow (clipped to its largest share all the same); a RuntimeWarning
    from gradprobe's own code on the user's console reads as the user's bug."""
    o = _judged(73406)
    assert o["own_warnings"] == [], o["own_warnings"]
