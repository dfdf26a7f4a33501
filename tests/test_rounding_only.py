"""A coordinate that moves the loss only at the loss's rounding level, at every step taken,
is no evidence against a slope that predicts far more: the steps may have left the range
where the loss is linear in it.

Case steep-65101 of the independent generator: sin(a0 (p0 - k0)) with a0 near 1e6 beside
exp terms that put the loss at 4.9e15 (its last place is 1), so p0's terms, bounded by 1.2,
move the loss by one unit in its last place at most however far the steps go. Its judge
differentiates the target with mpmath (50 digits): p0's analytic gradient is right, p1 carries
the planted bug.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from adversarial import judge  # noqa: E402


def test_a_correct_slope_read_off_a_loss_moved_by_rounding_alone_is_not_failed():
    outcome = judge("steep", 65101)
    assert not outcome["false_alarm"], outcome["status"]
    assert outcome["status"]["p0"] != "fail"
    assert outcome["status"]["p1"] == "fail" and outcome["found"]  # the planted bug still fails
