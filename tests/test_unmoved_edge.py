"""A whole gradient left out beside a domain edge within the params' scale
(gradprobe/engine/unmoved.py): the chain on measured rounding from below the edge.

adversarial steep-830112: backward leaves out the whole gradient of p0 (log(a (p - k)) with a
pole 2.5e-4 from the point) beside exp terms whose gradient reaches 9e19. p0's true gradient
(up to 4.8e4) lies below the target's floor (1e-4 of the largest tensor's rms), so the zero
passed there; at the tensor's own scale the first pair's numeric value, 47104 +- 32955 (the
loss's rounding taken as 8 units of eps |f|, f = 1.4e14), was not resolved, and the steps up to
the params' scale that look for a slope crossed the pole. From the widest step at which the
loss was finite on both sides, halved, the chain on the rounding measured along p0 (one unit
of the loss's last place) resolves the slope, and the tensor fails. Reference: mpmath through
the generator's judge.
"""

from __future__ import annotations


def test_a_dropped_gradient_beside_a_pole_and_a_huge_tensor_fails():
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 830112)
    assert o["found"] and not o["missed"], (o["status"], o["expect"])
    assert not o["false_alarm"], o["status"]
