"""Failures at coordinates whose ladders crossed kinks, where backward just beside the point
agrees with the numeric value on both sides: kinks closer than any step (float64 code).

Two ReLU residuals within 1e-13 of the point whose jumps nearly cancel leave both one-sided
derivatives agreeing at every step rounding resolves, while a correct backward returns, at the
point, the slope of the sliver between them (kinks-870705: four within 6e-14 along p2[0, 1], the
sides -1.877 down to steps of 1e-11, the correct value -2.061; kinks-591184: two exactly at 0).
No step reads that slope. But the code's own value just beside the point does: moved alone
by a step DELTA_SHARE of its first step (at least SPACINGS spacings of x), beyond such a sliver
and well within the linear piece the ladders read around it, a correct backward returns the
numeric value on both sides. A wrong one returns what it returned at the point (a bug that a
sharp bend confines to a small region, which the second look's moves of 1e-3 of the scale
leave behind, is still there: steep-870813, a softplus of sharpness 1e4 whose backward has
the sharpness 1).

So a float64 failure whose ladders crossed kinks, where backward at the coordinate moved by
+DELTA and by -DELTA agrees with the failing numeric value within the threshold and
SIGNIFICANCE of its bound, becomes `kink`. At most SLIVERS a tensor, the most decisive first;
two backward calls each.
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe
from .verdict import SIGNIFICANCE, Judged, as_kinks, crossed_failures

SLIVERS = 8  # failed coordinates per tensor looked at beside the point
DELTA_SHARE = 2.0**-20  # of the coordinate's first step (eps**(1/3) max(1, |x|)): about 6e-12 there
SPACINGS = 64.0  # and at least this many spacings of x


def sliver_kinks(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """``judged`` with the failures the module's note names judged `kink`."""
    beside = probe.beside
    failed = crossed_failures(probe, flat, judged, SLIVERS)
    if beside is None or failed.size == 0:
        return judged
    where = flat[failed]
    x = np.abs(probe.x[where].astype(np.float64))
    delta = np.maximum(DELTA_SHARE * probe.prior_steps(where), SPACINGS * np.spacing(x))
    values = beside(where, delta)
    if values is None:
        return judged
    n, err = judged.estimate.value[failed], judged.estimate.error[failed]
    allowed = probe.tolerance(where, n) + SIGNIFICANCE * err
    with np.errstate(invalid="ignore"):
        right = np.all(np.abs(values - n[None, :]) <= allowed[None, :], axis=0)
    return as_kinks(judged, failed[right])


__all__ = ["sliver_kinks"]
