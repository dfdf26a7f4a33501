"""The pair at a tiny step that tells a kink at the point from one beside it takes its
rounding bound as a few units of eps |f|. Where the loss's terms are far larger than f
(residuals X p - k near 0 out of products X p near 2,000), they round far more coarsely: a
move of a few spacings of x leaves the loss unchanged on a side whose slope predicts hundreds
of such bounds. That pair is then no evidence (kinks-120740 failed a correct gradient on it).
"""

from __future__ import annotations


def test_a_tiny_pair_whose_loss_did_not_move_is_no_evidence():
    """kinks-120740: three ReLU residuals exactly 0 at x = 64 (products of 2,000), the tiny
    step 3.5 spacings of x: the loss did not change on the right. Reference: mpmath, through
    the adversarial generator's judge; the backward is correct, so no tensor may fail."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 120740)
    assert not o["false_alarm"], (o["status"], o["expect"])
