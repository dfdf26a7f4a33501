"""float64 coordinates beside steep pieces whose bound rested on the assumed rounding of the loss
(8 units of eps |f|, or 4 per side of a slope's ladder): judged again on the rounding measured
along the coordinate, on a chain of halving steps whose windows check their own error model
(engine/steep_noise.py). Reference: mpmath at 50 digits, through the adversarial generator
(tests/adversarial: each piece's derivative from the standard tables, checked against mpmath's
own differentiation of the loss).
"""

from __future__ import annotations

import pytest

from adversarial import judge


@pytest.mark.parametrize(("seed", "tensor"), [
    (52084, "p1"),  # log(u) with u 1e-9 from its 0, the gradient 0.1% too large: was inconclusive
    (20072, "p2"),  # a term left out of a gradient otherwise 0 (1e-15 of the others): was pass
])
def test_steep_bugs_resolved_by_the_loss_fail(seed, tensor):
    o = judge("steep", seed)
    assert o["unverified"] is None and not o["correct"]
    assert o["expect"][tensor] == "fail"
    assert o["status"][tensor] == "fail", o["status"]
    assert not o["false_alarm"], (o["status"], o["expect"])


@pytest.mark.parametrize("seed", [52085, 21, 75, 20046, 49050, 52102])
def test_correct_steep_targets_beside_them_do_not_fail(seed):
    """Correct targets whose coordinates the ladders leave undecided for rounding (52085: exp of
    gains of 1e5, its widest finite steps far past the smooth range; and the others the ladders
    left undecided in the generator's runs): no tensor fails."""
    o = judge("steep", seed)
    assert o["unverified"] is None and o["correct"]
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert all(s != "fail" for s in o["status"].values())
