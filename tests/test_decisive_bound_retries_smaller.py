"""A central bound that already decides is not "noise-limited": an undecided coordinate then
retries at smaller steps, where its one-sided quotients resolve, not at wider ones.

adversarial steep-461145: a seventh power of a residual a (w - k) with a = 2.0e7, so that
d/dw c w7 (a (w - k))**7 = 7 a c w7 (a (w - k))**6 is 1.0e8 at the point while the loss is
11.4. At the ladder's steps (2.4e-7 and up) the one-sided quotients carry curvature terms of
1e12 and their bounds are 1e15: a value between them is left undecided (a kink could hide
there), though the central bound is 2.8, its rounding most of it. That "most of it" once sent
the retry to wider steps, which never resolve a term this steep, and a dropped gradient (0)
and one 50% off were reported inconclusive because of "rounding noise". At steps of 1e-9 and
below both sides agree with the central estimate to 1e-4 of it.

Reference: the power rule, d/du u**n = n u**(n-1) (table of derivatives; from memory), with
the chain rule; checked against mpmath.diff at 40 digits below.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe.common.status import FAIL, PASS
from gradprobe.engine.coordinates import check_coordinates

A, K, W, X0, C, REST = (20303972.333303284, -0.0019443491666490621, 0.8175375127469309, -0.0019443903738675568,
                        2.527078452040403, 11.4)
EXACT = C * W * 7 * A * (A * (X0 - K)) ** 6


def _loss(v):
    return REST + C * W * (A * (v[0] - K)) ** 7


def test_the_closed_form_is_mpmaths_derivative():
    with mpmath.workdps(40):
        f = lambda t: mpmath.mpf(C) * mpmath.mpf(W) * (mpmath.mpf(A) * (t - mpmath.mpf(K))) ** 7  # noqa: E731
        ref = mpmath.diff(f, mpmath.mpf(X0))
    assert float(ref) == pytest.approx(EXACT, rel=1e-12)


@pytest.mark.parametrize("factor, expected", [(1.0, PASS), (0.0, FAIL), (0.5, FAIL)])
def test_a_steep_power_is_decided_at_smaller_steps(factor, expected):
    out = check_coordinates(make_probe(_loss, np.array([X0]), np.array([factor * EXACT])), np.arange(1))
    assert out.status[0] == expected, (out.status, out.reasons)


def test_steep_461145_as_first_found_fails_its_dropped_gradient():
    """The case as generated: p1's gradient dropped from backward (mpmath, through the judge)."""
    from adversarial import judge

    o = judge("steep", 461145)
    assert not o["unverified"] and o["crash"] is None and not o["false_alarm"]
    assert o["status"]["p1"] == "fail", o["status"]
