"""float32 code whose loss is cast to float32 (no float64 run is possible), judged on its own
arithmetic: cases of the adversarial generator (tests/adversarial) whose verdicts were once
wrong. Reference: mpmath, through the generator's judge (every case's gradient is the same
expression differentiated at 50 digits; a tensor mpmath puts within a third of the threshold
must not fail, one beyond 1.5 times it with a resolvable bug must).
"""

from __future__ import annotations

import pytest


def _judged(seed: int) -> dict:
    from adversarial import judge

    o = judge("float32only", seed)
    assert o["unverified"] is None and o["crash"] is None, o
    return o


# Huber corners (f'' jumps, f' does not) among the wide steps of code judged on its own float32
# arithmetic. 1213: 1e-5 from the point along a param of scale 10, so every central quotient
# carries a term in s (its changes halve as the step halves), which the window's c4 model read
# as its s**4 term within rounding: a correct element failed on a bound 4 times too small (the
# other tensor's 0.5% element bug must still fail). 3288: 0.034 from the point, between a
# window's first two steps, where the quotients' changes happened to shrink fourfold: the
# second differences, which jump there, now keep that window out.
CORNER_SEEDS = [1213, 3288]


@pytest.mark.parametrize("seed", CORNER_SEEDS)
def test_a_corner_between_wide_steps_is_no_false_alarm(seed):
    o = _judged(seed)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["correct"] or o["found"], (o["status"], o["expect"])


# A coarsely rounding exp summand elsewhere in the loss (its rounding, when every tensor moves,
# set one noise figure for the whole target) left these bugs undecided: 1248 (a wrong piece's
# derivative, 65-180% off, on a tensor whose own effect on the loss is far above that rounding)
# and 1309 (one element 20% off). Each coordinate's own rounding, measured when it moves, shows
# them.
OWN_ROUNDING_SEEDS = [1248, 1309]


@pytest.mark.parametrize("seed", OWN_ROUNDING_SEEDS)
def test_a_bug_beside_a_coarsely_rounding_summand_fails(seed):
    o = _judged(seed)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["expect_fail"] and o["found"], (o["status"], o["expect"])
    assert not o["to_locate"] or o["located"], o["status"]
