"""A failure judged on the tiny step's reading stands only where a step a quarter as long
reads the same (gradprobe/engine/quarter_step.py).

adversarial kinks-591166: Huber residuals near their corners beside the point along p1[3, 1].
The ladder's one-sided extrapolations lay 2.3e-4 apart with bounds of 1e-5 and 2e-5 (the
corners within its steps), the right side was confirmed by its quotient at a tiny step of
7.6e-6, and both lay 3.9e-4 off the true derivative -94.560813 (the generated backward's
value; mpmath through the judge): the quotients still move by 2.6e-4 at a quarter of that
step. (Bugs beside a kink whose tiny reading holds still fail: tests/test_kink_beside.py.)
"""

from __future__ import annotations


def test_kinks_591166_as_first_found_is_no_false_alarm():
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 591166)
    assert not o["false_alarm"], (o["status"], o["expect"])

