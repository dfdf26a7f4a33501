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
    from adversarial import judge

    o = judge(category, seed)
    assert o["unverified"] is None and o["crash"] is None, o
    return o


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
