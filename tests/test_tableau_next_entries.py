"""Richardson's tableau keeps a bound only while the rows after it bear it out.

Two ways rows built after an estimate show that the rows it came from were not yet where its
error model holds:

- an extrapolated column's next entry falls off the estimate by more than the column's
  model allows (its distance shrinks 16-fold per halving in the first extrapolated column
  of central quotients). adversarial steep-490011: softplus of sharpness 100 with a slope
  of -525 inside, its bend 1.9e-5 wide; the first extrapolations at steps 1.5e-5 and 7.6e-6
  agreed to 3.6e-4 by chance and the next turned by 2.2e-3, while the estimate taken from
  them, 489.96657 +- 7.7e-4, lay 2.4e-3 off the true 489.96420;
- the quotients move away from the estimate three rows running, one way, whatever the moves'
  sizes: adversarial kinks-500818, Huber corners 1e-7 to 1e-6 beside the point, whose
  quotients settled on a turn (bound 2.6e-9) and then moved 6.7e-10, 8.9e-10, 1.2e-9,
  1.7e-9 toward the true value 1e-8 away, each move inside the rounding allowance.

References: d/dx log(1 + e^(s x)) / s = 1 / (1 + e^(-s x)) (table of derivatives, the
logarithm's and exponential's entries, with the chain rule; from memory), checked against
mpmath below; the generated cases through the adversarial judge (mpmath).
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe.common.status import FAIL, PASS
from gradprobe.engine.coordinates import check_coordinates
from gradprobe.engine.ladder import tableau

# steep-490011's coordinate p0[3, 0]
A, K, W, X0, C, REST = (-525.1561047634877, -118.16300853724, -0.11725531953653912, -118.16305487240578,
                        8.655068401825995, -39.45)
EXACT = C * W * A / (1 + np.exp(-100 * A * (X0 - K)))


def _softplus_loss(v):
    return REST + C * W * float(np.logaddexp(0.0, 100 * A * (v[0] - K))) / 100


def test_the_closed_form_is_mpmaths_derivative():
    with mpmath.workdps(40):
        f = lambda t: (mpmath.mpf(C) * mpmath.mpf(W)  # noqa: E731
                       * mpmath.log(1 + mpmath.exp(100 * mpmath.mpf(A) * (t - mpmath.mpf(K)))) / 100)
        assert float(mpmath.diff(f, mpmath.mpf(X0))) == pytest.approx(EXACT, rel=1e-12)


@pytest.mark.parametrize("factor, expected", [(1.0, PASS), (1.0001, FAIL)])
def test_an_extrapolation_turned_at_the_next_row_keeps_no_tight_bound(factor, expected):
    out = check_coordinates(make_probe(_softplus_loss, np.array([X0]), np.array([factor * EXACT])), np.arange(1))
    assert out.status[0] == expected, (out.status, out.numeric, out.error_estimate)


def test_quotients_heading_away_three_rows_widen_the_bound():
    """kinks-500818's ladder at p0[0, 0] as measured (steps 3.05e-5 halving to 4.77e-7, the
    loss's rounding 1.74e-15): the estimate's bound must cover the true derivative
    -0.005498807657 (the generated backward's value, which the judge's mpmath confirms)."""
    q = np.array([-0.00549879863684, -0.00549881188635, -0.0054988158372, -0.00549881516781,
                  -0.00549881428014, -0.00549881305778, -0.00549881136976])
    h = 3.0517578125e-05 / 2.0 ** np.arange(q.size)
    noise = 2 * 1.74e-15 / (2 * h)
    est = tableau(q[:, None], noise[:, None], 2.0, 2)
    truth = -0.005498807657162587
    assert abs(est.value[0] - truth) <= 3 * est.error[0], (est.value, est.error)


@pytest.mark.parametrize("category, seed", [("steep", 490011), ("kinks", 500818)])
def test_the_cases_as_first_found_are_no_false_alarm(category, seed):
    from adversarial import judged_cleanly

    o = judged_cleanly(category, seed)
    assert not o["false_alarm"], (o["status"], o["expect"])
