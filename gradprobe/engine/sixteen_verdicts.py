"""16-bit coordinates left undecided by rounding, judged on their jittered estimate
(:mod:`.sixteen`).

A coordinate passes where the analytic value lies within the threshold of that estimate and
the bound resolves the threshold: |a - n| <= tol and bound <= tol, tol the threshold times
the coordinate's scale, the tensor's typical gradient at least (point.Point.probe: a
16-bit backward rounds at u times the terms it combines, as large as that scale, judged on
its own arithmetic as on a wider run), plus the rounding backward's own computation accumulates, measured
(point.Point.coarse_jitter: how much the analytic value varies between points a few units
of the 16-bit grid apart; it is not defined more finely), and where the estimate lies
within both bounds of the one the coordinate was left undecided with (a kink between the
point and the wide steps, over which the wide quotients average, puts them apart; checked
against mpmath on the adversarial inside16 set, the bounds hold wherever no kink lies within
the steps). A coordinate fails where the estimate continues what the smaller steps saw and
the analytic value lies beyond the threshold and beyond SIGNIFICANCE bounds of the estimate
plus the largest jump a kink within the levels could have (plus, on both, the analytic
value's own rounding): a kink of jump J straddled by the steps puts their central quotients
J / 2 from the one-sided value a correct gradient gives, and its jump shows in the one-sided
gap of two levels extrapolated to a step of 0 (:func:`.sixteen._kink_jump`, with its rounding; a
smooth loss shows only rounding and higher orders there): the widest two, or lines through
the levels about the widest one the estimate takes, which carry far less of the gap's
higher orders. Checked against
mpmath on the adversarial inside16 and float16 sets: without the kink term 8 of 209 correct
targets failed, with it none, while bugs of 16-bit code on small-scale params fail. What no
step can tell apart stays a limit: a ripple of the loss smaller than its rounding and
narrower than the smallest level (a * sin(k b) with a below the loss's rounding) changes no
quotient beyond rounding yet adds a * k to the derivative; the analytic value then varies
between points a few units of the grid apart, and that variation (the fuzz above, measured
at spacings of 4, 3 and 2 units) counts against a failure, here, in reconcile.unfuzzed and
along a direction. A ripple whose period on the grid (after aliasing) spans tens of units
shows in no such variation and stays a limit. A loss bitwise the loss at the point at every
jittered step of every level is a slope of 0 within one spacing of the type, at the binade
above the loss's measured scale, over the widest step (:func:`.sixteen.flat_bound`). A coordinate neither passed nor failed stays as it was; its reason then names the
smallest relative error that the jittered estimate's bound lets show on it (SIGNIFICANCE
bounds over its scale), or says that no window bounded it.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL, INCONCLUSIVE, PASS
from .ladder import Estimate
from .probe import TensorProbe
from .refine import Taken
from .sixteen import coarse, flat_bound, jittered_all
from .verdict import NOISE, SIGNIFICANCE, Judged


def measured_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with coordinates that rounding noise left undecided passed where the
    jittered estimate resolves the threshold and agrees within it, failed where it lies
    beyond the threshold, SIGNIFICANCE bounds and any kink's jump (see the module)."""
    if not coarse(probe):
        return judged
    noisy = np.flatnonzero((judged.status == INCONCLUSIVE)
                           & np.array([r == NOISE for r in judged.reasons], dtype=bool))
    if noisy.size == 0:
        return judged
    est, jump, unmoved, widest = jittered_all(probe, flat[noisy], taken)
    # A loss flat at every level: a slope of 0 within its bound (:func:`.sixteen.flat_bound`), judged
    # as any estimate (flat on both sides, it straddles no kink that shows).
    est = Estimate(np.where(unmoved, 0.0, est.value), np.where(unmoved, flat_bound(probe, widest), est.error))
    jump = np.where(unmoved, 0.0, jump)
    a = probe.a[flat[noisy]]
    tol = base = probe.tolerance(flat[noisy], est.value)
    fuzz = probe.own_rounding() if probe.own_rounding is not None else None
    if fuzz is not None:  # the analytic value is not defined more finely than its own rounding
        tol = tol + fuzz[flat[noisy]]
    # And it continues what the smaller steps saw: within both bounds of the estimate the
    # coordinate was left undecided with (a kink between the point and the wide steps, which
    # the wide quotients average over, puts them apart).
    before = judged.estimate.pick(noisy)
    continues = (np.abs(est.value - before.value) <= est.error + before.error) | unmoved
    off = np.abs(a - est.value)
    passed = np.isfinite(est.error) & (off <= tol) & (est.error <= tol) & continues
    # A discrepancy beyond the threshold and SIGNIFICANCE bounds (the analytic value's own
    # rounding on top of both) fails, as on every estimate, where it also exceeds what a kink
    # within the levels could explain: quotients straddling a kink of jump J average its
    # sides, J / 2 from the one-sided value a correct gradient gives (J taken whole, twice).
    failed = np.isfinite(est.error) & continues & (off > tol) & (off > SIGNIFICANCE * est.error + jump + (tol - base))
    decided = passed | failed
    judged = _explained(probe, flat, judged, noisy[~decided], est.pick(np.flatnonzero(~decided)))
    if not decided.any():
        return judged
    which = noisy[decided]
    status = np.where(passed, PASS, FAIL)[decided].astype(judged.status.dtype)
    now = Judged(status, est.pick(np.flatnonzero(decided)), (None,) * which.size, np.zeros(which.size, dtype=bool))
    return judged.merged(which, now)


def _explained(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, est: Estimate) -> Judged:
    """The reason of coordinates ``which`` (still undecided by rounding) with what the jittered
    estimate ``est`` could resolve on each (see the module)."""
    if which.size == 0:
        return judged
    scale = probe.denominators(flat[which], est.value)
    with np.errstate(over="ignore"):  # a bound over a scale of the smallest normal: none (inf)
        smallest = np.maximum(SIGNIFICANCE * est.error, probe.tolerance(flat[which], est.value)) / scale
    reasons = list(judged.reasons)
    for k, i in enumerate(which.tolist()):
        if np.isfinite(smallest[k]):
            reasons[i] = (f"{NOISE}: its {probe.compute_dtype} rounding, measured at the widest steps its scale "
                          f"allows, hides any relative error below {smallest[k]:.2g} on it")
        else:
            reasons[i] = (f"{NOISE}: no estimate at the widest steps its scale allows bounds it (the "
                          f"{probe.compute_dtype} loss does not change measurably there, or its quotients do "
                          f"not follow the error model of central differences)")
    return Judged(judged.status, judged.estimate, tuple(reasons), judged.noise_limited)
