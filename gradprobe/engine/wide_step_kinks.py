"""Failures a kink within the wide steps could explain, made undecided.

Code judged on its own narrow arithmetic is judged on steps wide enough to beat its
rounding (:mod:`.wide_steps`); a kink may then lie between the point and those steps. The
one-sided quotients the wide estimate already took show it: their gap grows faster than
curvature makes it, with the analytic value between them (:func:`kinks_within_reach`; no
new evaluations). Used where each coordinate's own rounding is measured
(:mod:`.own_rounding`).
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE
from .ladder import Estimate
from .probe import TensorProbe
from .refine import Taken, pairs_reusing
from .verdict import Judged
from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_NOISE, WIDE_ROWS

KINK_WITHIN = ("a kink may lie within the wide steps that rounding needs: the one-sided quotients there differ "
               "more than curvature makes them, and the analytic value lies between them, as a correct "
               "gradient beside a kink does")


def kinks_within_reach(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` (verdicts at coordinates ``flat`` from the wide steps) with the failures a kink
    within those steps could explain made inconclusive. The wide windows admit a kink test (the
    one-sided gap grows with the step) that rounding room can pass; a kink at a distance d below
    the step s, with the other side clean, puts the central quotient half the one-sided gap from
    f' (D - f' = (R - L) / 2: R and L are the right and left quotients, one of which is f').
    So a failure stands only where no wide step within the params' scale shows one-sided
    quotients further apart (beyond WIDE_NOISE times their rounding) than the curvature seen at
    the wider steps makes them, with the analytic value between them (within the tolerance and
    that rounding). The pairs are those ``taken`` by the wide estimate: no new evaluations."""
    fails = np.flatnonzero(judged.status == FAIL)
    if fails.size == 0:
        return judged
    where, n = flat[fails], fails.size
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    asked = np.concatenate([probe.prior_steps(where) * 2.0**k for k in ks])
    p = pairs_reusing(probe, np.tile(where, ks.size), asked, taken)
    right, left = (q.reshape(ks.size, n) for q in p.sides(probe.f0))
    s = (0.5 * (p.h_plus + p.h_minus)).reshape(ks.size, n)
    noise = WIDE_NOISE * (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(ks.size, n)
    within = s <= np.maximum(np.abs(probe.x[where].astype(np.float64)), probe.x_scale)[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        per_step = np.where(within, np.abs(right - left) / s, np.inf)
        # Curvature makes the gap grow in proportion to the step: the least gap per step at
        # the wider steps is what it allows at this one (twice, as the windows allow).
        wider = np.minimum.accumulate(per_step[::-1], axis=0)[::-1]
        wider = np.vstack([wider[1:], np.full((1, n), np.inf)])
        a = probe.a[where]
        margin = probe.tolerance(where, a)[None, :] + noise
        kinky = within & (np.abs(right - left) > noise) & (per_step > 2.0 * wider)
        between = (a >= np.minimum(left, right) - margin) & (a <= np.maximum(left, right) + margin)
    explained = np.flatnonzero((kinky & between).any(axis=0))
    if explained.size == 0:
        return judged
    status, reasons = judged.status.copy(), list(judged.reasons)
    status[fails[explained]] = INCONCLUSIVE
    for k in fails[explained].tolist():
        reasons[k] = KINK_WITHIN
    value, error = judged.estimate.value.copy(), judged.estimate.error.copy()
    error[fails[explained]] = np.inf
    return Judged(status, Estimate(value, error), tuple(reasons), judged.noise_limited)


__all__ = ["KINK_WITHIN", "kinks_within_reach"]
