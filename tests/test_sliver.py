"""A float64 failure whose ladders crossed kinks, where backward just beside the point agrees
with the numeric value on both sides, is a kink (gradprobe/engine/sliver.py).

Several ReLU residuals within 1e-13 of the point, their jumps nearly cancelling, leave both
one-sided derivatives agreeing at every step that rounding resolves, while the correct value
(the per-kink convention at the point) is the slope of the sliver between them:
- kinks-870705: four residuals within 6e-14 along p2[0, 1]; the sides read -1.877 down to
  steps of 1e-11, the correct value is -2.061;
- kinks-591184: two residuals exactly at 0 with jumps of +52.3 and -52.6.
Just beside the point, beyond the sliver, backward returns the numeric value on both sides.
A bug that a sharp bend confines near the point is still there just beside it, and fails:
steep-870813 and steep-830714 (a softplus of sharpness 1e4 whose backward has sharpness 1; the
second look's moves of 1e-3 of the scale leave the bend behind, and the code is right there).
Reference: mpmath through the generator's judge.
"""

from __future__ import annotations

import pytest


@pytest.mark.parametrize("seed", [870705, 591184])
def test_a_sliver_between_kinks_closer_than_any_step_is_a_kink(seed):
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", seed)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert "kink" in o["status"].values() and "fail" not in o["status"].values(), o["status"]


@pytest.mark.parametrize("seed", [870813, 830714])
def test_a_bug_confined_near_the_point_by_a_sharp_bend_still_fails(seed):
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", seed)
    assert o["found"] and not o["missed"], (o["status"], o["expect"])
