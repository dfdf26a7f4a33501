"""Kinks that crowd the point, some closer than any step rounding noise allows.

An absolute-error or ReLU loss over many samples whose residuals sit at every distance from
0 to 1e-2 of their scale puts kinks along a coordinate at every decade of step. Quotients
across a kink at distance d < h change by jump * d / h: like 1/h as the step shrinks, never
as a smooth loss's error model says; and several kinks within the smallest step add jumps of
either sign to the values a correct gradient may take at the point. Neither is evidence of a
bug: such coordinates are left undecided with the reason (and a second look off the point
fails them only where the code is wrong there too).

References: mpmath, through the adversarial generator's judge (tests/adversarial: each case's
gradient is its expression differentiated at 50 digits); the c/h change of a quotient across
a kink is the definition of the one-sided difference of |x - d| (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from adversarial import judge

from gradprobe.engine.ladder import drifting, tableau


@pytest.mark.parametrize("seed", [1245, 1332, 1349])
def test_quotients_drifting_like_one_over_h_bound_nothing(seed):
    """Correct code (mpmath agrees to rounding) whose quotients at the smallest steps drift
    like 1/h within the loss's rounding allowance: once failed with bounds of 1e-4..0.7
    against discrepancies of 1..5; now not failed, and left undecided only with a reason."""
    o = judge("kinks", seed)
    assert o["correct"] and not o["unverified"] and o["crash"] is None
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_a_value_outside_the_sides_of_crowded_kinks_is_not_a_bug():
    """kinks-12: a ReLU residual layer whose coordinate p2[0, 0] sees kinks at 1e-9 and 1e-10
    and more within 2e-12 (left 259.6, right -78.4, mpmath -262.68 = the code's value): the
    tensor is no longer failed; the planted bug in p1 (one element 20% off) still is, and
    located."""
    o = judge("kinks", 12)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["status"]["p2"] in ("kink", "inconclusive", "pass")
    assert o["found"] and o["located"], o["status"]


@pytest.mark.parametrize("seed", [2575, 2810, 2840])
def test_a_failure_resting_on_sides_that_crossed_kinks_is_withheld(seed):
    """Correct code whose coordinate once failed on the evidence of sides that themselves
    crossed kinks among the steps: kinks-2575 (a kink kept at the tiny step, sides +-493.9
    drifting like 1/h below the rounding, mpmath -806.4), kinks-2810 (the sides' mean, 1.40
    +- 0.60 against mpmath's 3.25), kinks-2840 (the side taken as clean, -633.30 +- 0.02
    against mpmath's -934.35, had crossed a kink at 1e-9 itself)."""
    o = judge("kinks", seed)
    assert o["correct"] and not o["unverified"] and o["crash"] is None
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_quotients_receding_from_the_estimate_widen_its_bound():
    """kinks-2634: a Huber residual whose second derivative jumps within the ladder's steps.
    The central quotients agreed at the fourfold rate by a coincidence of orders (5.774936
    +- 1.1e-5), then moved away from that value row after row, by less than the rounding
    allowance, towards mpmath's 5.7749697: the bound now covers them (no failure)."""
    o = judge("kinks", 2634)
    assert o["correct"] and not o["false_alarm"], (o["status"], o["expect"])


def test_a_one_over_h_drift_is_told_from_rounding_and_from_a_smooth_loss():
    """One-sided quotients of |x - d| at x = 0 with d = 1e-12 (a kink just beside the point):
    (f(h) - f(0)) / h = 1 - 2 d / h for h > d (common practice): they drift like 1/h. A
    fixed rounding offset of half a noise unit drifts the same way but within the noise; the
    quotients of sin at 0.3 (a smooth loss) change less and less."""
    h = 2.0 ** -np.arange(25, 32)
    d = 1e-12
    noise = 2.0 * 1e-16 / h  # a loss of size 1: its rounding over the step
    kink = (1.0 - 2.0 * d / h)[:, None]
    assert drifting(kink, noise[:, None], 2.0)[-1, 0]
    offset = (0.7 + 0.25 * noise)[:, None]  # f(x + h) rounded a fixed quarter-noise away
    assert not drifting(offset, noise[:, None], 2.0).any()
    smooth = ((np.sin(0.3 + h) - np.sin(0.3)) / h)[:, None]
    assert not drifting(smooth, noise[:, None], 2.0).any()
    # The tableau gives a drifting column no bound: it cannot say where the quotients end.
    assert not np.isfinite(tableau(kink, noise[:, None], 2.0, 1).error[0])


def test_a_bug_found_off_the_point_in_its_own_tensor_is_a_finding():
    """shapes-1302: a 0-d param exactly at the kink of |a (p - k)| with the term's gradient
    dropped. At the point the code's 0 is sign(0) = 0 (mpmath agrees); moved off the kink it
    is wrong (the term is missing): the second look fails it, as tests/test_kinks.py requires
    of code right only at the kink. The judge counts that as a finding, not an alarm."""
    o = judge("shapes", 1302)
    assert o["bug"] == "dropped" and o["status"]["p0"] == "fail"
    assert o["expect"]["p0"] == "any" and not o["false_alarm"]
