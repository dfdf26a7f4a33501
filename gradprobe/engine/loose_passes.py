"""Passes of float32 code judged on its own arithmetic whose bound lies above the threshold,
looked at again on the wide steps.

In narrow arithmetic a pass needs the discrepancy within the threshold and a bound below the
coordinate's scale (verdict._resolved): at the first steps the loss's rounding can leave a
bound far above the threshold while the value agrees. Such a pass says only that the
relative error lies below the threshold plus its bound, and a bug of that size can pass where
the estimate's own error happens to cancel it (a bias element 0.5% off passed at a bound of
3.8%). The wide steps that undecided coordinates get (:func:`.wide_steps.wide_estimate`,
then each coordinate's own rounding and averaged pairs, :mod:`.own_rounding`) usually bound the
derivative far more tightly: the LOOSE passes with the largest bounds over the threshold are
judged there again. A failure found there stands (a discrepancy beyond the threshold and
SIGNIFICANCE bounds of an estimate whose model was checked on the coordinate), as does a pass
with a smaller bound; elsewhere the first pass stays as it was where its bound is at most
REACH tolerances (the first steps' bound is their rounding alone; beyond it such an agreement
could not tell an error of ten thresholds, 0.49% in float32, from none, and the wide steps'
verdict stands, undecided with the smallest error it could have seen). A note names the
tensors whose passes still carry a bound above the threshold (from either stage): there a
pass says the relative error is below the threshold plus that bound.
16-bit arithmetic, a staircase of its own, keeps its rules (:mod:`.along`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..common.roundoff import is_narrow, unit_roundoff
from ..common.status import FAIL, INCONCLUSIVE, PASS
from .probe import TensorProbe
from .verdict import NOISE, Judged

REACH = 9.0  # a pass's bound is at most 9 tolerances: it tells an error of 10 thresholds from none
LOOSE = 400  # passes per tensor looked at again (the loosest first), as many as ladders re-estimate


def loose_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> np.ndarray:
    """Positions in ``flat`` of passes whose bound lies above the threshold (float32-like
    narrow arithmetic only; the loosest LOOSE of them)."""
    if not _finer_than_sixteen_bits(probe):
        return np.zeros(0, dtype=np.int64)
    tol = probe.tolerance(flat, judged.estimate.value)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        over = judged.estimate.error / tol
    loose = np.flatnonzero((judged.status == PASS) & (over > 1.0))
    if loose.size > LOOSE:
        loose = np.sort(loose[np.argsort(-over[loose], kind="stable")[:LOOSE]])
    return loose


def tightened(probe: TensorProbe, flat: np.ndarray, judged: Judged,
              again: Callable[[Judged], Judged]) -> Judged:
    """``judged`` with its loose passes judged again by ``again`` (the wide steps' stage, which
    takes verdicts and re-judges those left undecided by rounding): failures and passes with a
    smaller bound taken, every other loose pass kept as it was where its first bound is at
    most REACH tolerances (beyond, the wide steps' verdict and reason stand)."""
    loose = loose_passes(probe, flat, judged)
    if loose.size == 0:
        return again(judged)
    reasons = list(judged.reasons)
    for k in loose.tolist():
        reasons[k] = NOISE
    status = judged.status.copy()
    status[loose] = INCONCLUSIVE
    noisy = judged.noise_limited.copy()
    noisy[loose] = True
    redone = again(Judged(status, judged.estimate, tuple(reasons), noisy))
    first, second = judged.pick(loose), redone.pick(loose)
    take = (second.status == FAIL) | ((second.status == PASS) & (second.estimate.error < first.estimate.error))
    # The first steps' bound is their rounding alone (it knows nothing of truncation): an
    # agreement there whose bound cannot tell an error of REACH + 1 thresholds from none is
    # no pass once the wide steps could not confirm it.
    take |= first.estimate.error > REACH * probe.tolerance(flat[loose], first.estimate.value)
    return redone.merged(loose[~take], first.pick(np.flatnonzero(~take)))


def _finer_than_sixteen_bits(probe: TensorProbe) -> bool:
    return is_narrow(probe.compute_dtype) and unit_roundoff(probe.compute_dtype) < unit_roundoff(np.float16)


def loose_note(probe: TensorProbe, status: np.ndarray, bound: np.ndarray, scale: np.ndarray) -> str | None:
    """What a tensor's passes with a bound (absolute; ``scale`` its denominators) above the
    threshold say (after :func:`tightened`), or None where there are none."""
    if not _finer_than_sixteen_bits(probe):
        return None
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        relative_bound = bound / scale
    loose = (status == PASS) & (relative_bound > probe.threshold)
    if not loose.any():
        return None
    n, worst = int(loose.sum()), float(relative_bound[loose].max())
    which = f"{n} passing coordinates carry" if n > 1 else "1 passing coordinate carries"
    return (f"{probe.tensor}: {which} an error bound above the threshold (up to {worst:.2g} relative), the "
            f"tightest the wide steps found in the loss's {probe.compute_dtype} rounding: there a pass says "
            f"the relative error is below the threshold plus that bound")
