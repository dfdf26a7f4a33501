"""float64 failures judged again on the rounding measured along the coordinate
(gradprobe/engine/measured_failures.py).

adversarial kinks-830535: ReLU residuals along p3[0, 1] at 0 and 6e-14 from their kinks, with
jumps of -11.6 and -8.3 (so the correct value, 7.25, is the slope of the 3e-14 sliver between
them, outside both one-sided derivatives, -1.06 and -4.31), and others 6e-10 to 6e-5 away. The
second ladder's left quotients went -2.32, -2.08, -1.58 and then -1.09 three rows running: a
kink crossed, but within the assumed rounding's allowance (8 units of eps |f|, 0.17 to 0.67 at
those steps, while the rows moved by one unit of the loss's last place), so the left estimate
stayed at -2.08 +- 0.58, the sides were not told apart, and the central estimate failed the
correct value. On the rounding measured along the coordinate (a fifth of the assumed figure)
the ladders leave it undecided, and the second look off the point decides. The planted sign
bug on p2 still fails. Reference: mpmath through the generator's judge.
"""

from __future__ import annotations


def test_kinks_830535_fails_only_the_planted_bug():
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 830535)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["status"]["p2"] == "fail" and o["found"], o["status"]


def test_a_failure_the_ladders_cannot_speak_to_stands():
    """steep-720310: a 20% element bug beside a log's pole, failed by the chain on the
    rounding measured along the coordinate after the ladders were left undecided for rounding;
    judged again on that rounding the ladders are still undecided for rounding, which says
    nothing against the failure: it stands, located."""
    from adversarial import judged_cleanly

    o = judged_cleanly("steep", 720310)
    assert o["found"] and o["located"], (o["status"], o["expect"])
