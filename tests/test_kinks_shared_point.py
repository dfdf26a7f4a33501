"""Several kinks meeting at the point beside a smooth part, and kinks closer than any step
beside one at the point.

A shop's stock-out penalty: hinge terms max(z, 0) in the demand residuals z = X p - k, two of
them exactly at their corner (upstream weights of opposite signs), one well inside its linear
piece. Along the coordinate the loss is S h + c1 max(h, 0) + c2 max(-h, 0): its one-sided
derivatives are S + c1 (right) and S - c2 (left), and the usual per-kink convention (the
derivative of max(z, 0) taken as 0 at z = 0) gives S, which need not lie between them, nor
between 0 and their sum. No pair of one-sided derivatives tells how many kinks meet at the
point, so such a value is not evidence of a bug; a wrong gradient shows off the point.

References: the one-sided derivatives are mpmath's (``mp.diff`` with ``direction``, 30
digits); d/du max(u, 0) = 1 for u > 0 and 0 for u < 0 (common practice).
"""

from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.common.status import FAIL, Status

X = np.array([[1.0], [1.0], [-1.0]])
Z = np.array([0.75, 0.0, 0.0])  # residuals at the point: one inside, two at their corner
W = np.array([1.0, -2.0, 1.0])
P0 = np.array([0.375])
K = X @ P0 - Z  # exact in binary: z is exactly 0 where it should be


def _forward(params, inputs):
    z = X @ params["p"] - K
    return float(np.sum(W * np.maximum(z, 0.0)))


def _backward(params, inputs, factor=1.0):
    z = X @ params["p"] - K
    return {"p": factor * (X.T @ (W * (z > 0.0)))}


def _mp_loss(h):
    return mp.fsum(W[i] * max(mp.mpf(Z[i]) + mp.mpf(X[i, 0]) * h, 0) for i in range(3))


def test_the_one_sided_derivatives_are_not_the_conventional_value():
    """mpmath's one-sided derivatives are -1 (right) and 0 (left); the convention gives 1."""
    mp.mp.dps = 30
    right = mp.diff(_mp_loss, 0, direction=1)
    left = mp.diff(_mp_loss, 0, direction=-1)
    assert abs(right - (-1)) < 1e-20 and abs(left) < 1e-20
    assert _backward({"p": P0.copy()}, {})["p"][0] == 1.0


def test_several_kinks_at_the_point_beside_a_smooth_part_are_not_a_failure():
    """The conventional gradient (outside its sides and 0 .. their sum) is not failed."""
    report = probe(_forward, _backward, {"p": P0.copy()})
    (t,) = report.tensors
    assert t.status != Status.FAIL, t
    assert report.ok


@pytest.mark.parametrize("factor", [1.5, -1.0])
def test_a_wrong_gradient_there_still_fails(factor):
    """The same gradient scaled by 1.5, or its sign flipped, fails (off the point the kinks part
    and the smooth part shows it)."""
    report = probe(_forward, lambda p, i: _backward(p, i, factor), {"p": P0.copy()})
    (t,) = report.tensors
    assert t.status == Status.FAIL and not report.ok


@pytest.mark.parametrize("seed", [52053, 52262])
def test_generator_cases_with_kinks_at_and_beside_the_point_are_not_false_alarms(seed):
    """kinks-52053 (ReLU residuals exactly 0 in four rows, upstream weights of both signs) and
    kinks-52262 (absolute residuals 0 and 3e-11 from their corners, one side steady while the
    other crosses kinks): the correct tensor was failed; the judge's reference is mpmath."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", seed)
    assert not o["false_alarm"], o["status"]
    if not o["correct"]:
        assert o["found"], o["status"]
