"""Planted bugs far larger than the threshold on coordinates where rounding keeps the
threshold itself out of reach: the coordinate may stay undecided at the threshold's scale,
but a discrepancy the arithmetic does resolve (a factor of 2, 20% of one element) fails.

Reference: mpmath, through the adversarial generator's judge (every case's gradient is the
same expression differentiated at 50 digits; a tensor whose planted bug the loss's
rounding resolves must fail, one mpmath puts within the threshold must not).
"""

from __future__ import annotations

import pytest


def _judged(category: str, seed: int) -> dict:
    from adversarial import judged_cleanly

    return judged_cleanly(category, seed)


# steep-9039: a u**7 term beside an exp term 1e13 times larger, its gradient doubled. The
# slope bends 13% at the first step, the ladders start a 16-fold level below it, where the
# loss's rounding (1e13 * eps) leaves a bound above half the gradient; the retry for noise
# goes up in 16-fold levels only, and the next is far past the bend. The steps between
# settle it. float32only-9128: a float32 loss, a gradient 0.5% off (the threshold 4.9e-4), the same gap.
CASES = [("steep", 9039), ("float32only", 9128)]


@pytest.mark.parametrize("category,seed", CASES)
def test_a_bug_the_arithmetic_resolves_fails_though_the_threshold_does_not(category, seed):
    o = _judged(category, seed)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["expect_fail"] and o["found"], (o["status"], o["expect"])


def test_no_coordinate_passes_on_one_sided_quotients_drifting_like_c_over_h():
    """steep-18015: 1/(1 - u) with poles 2e-4 to 1e-10 from the point, p3's gradient missing
    its chain factor (about -3000). On p3[0] the loss's rounding (about 1e3) hides the slope
    at every step inside the pole's distance, and the one-sided quotients further out moved
    like 124 / h (the loss a fixed amount off at every step): the top one, -20, was taken as
    the slope and passed the wrong -160. The correct gradient is the generator's backward
    without the bug, checked against mpmath by its judge."""
    import numpy as np
    from adversarial.bugs import make_case
    from adversarial.case import load

    from gradprobe import probe

    assert _judged("steep", 18015)["unverified"] is None
    case = make_case("steep", 18015)
    ns, right = load(case), load(case.with_bug(None))
    params, inputs = ns["setup"]()
    with np.errstate(all="ignore"):
        truth = right["backward"](params, inputs)["p3"]
    t = probe(ns["forward"], ns["backward"], params, inputs).tensor("p3")
    assert t.status != "pass"
    undecided = {d.index for d in t.details}
    wrong = ns["backward"](params, inputs)["p3"]
    assert abs(wrong[0] - truth[0]) > 0.5 * abs(truth[0])  # the bug is there, 3000-fold
    assert (0,) in undecided
