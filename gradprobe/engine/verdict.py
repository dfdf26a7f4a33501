"""Per-coordinate verdicts from analytic values and numeric estimates with error bounds.

The relative error of a coordinate is |a - n| / max(|a|, |n|, floor) (the floor is set by
the probe from the tensor's and the target's gradient scales). A coordinate

- passes when the discrepancy is within the threshold;
- fails only when the discrepancy exceeds both the threshold and SIGNIFICANCE error bounds;
- is a kink when its one-sided derivatives are seen to differ and the analytic value is one
  a kink between them could give (:mod:`.kinks` judges the one-sided evidence);
- is inconclusive otherwise, with the reason.

This module holds the comparison of one estimate with the analytic value, the verdicts'
container and the vocabulary of reasons every stage shares.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from .ladder import Estimate
from .probe import TensorProbe
from ..common.roundoff import is_narrow
from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS

SIGNIFICANCE = 3.0  # a coordinate's discrepancy beyond 3 error bounds is evidence of a bug

NOISE = "rounding noise in the loss is above the threshold at every step tried"
UNSETTLED = "the numeric estimate does not settle as the step shrinks (the loss is not smooth on the scale of the steps tried)"
NEAR_KINK = "a kink lies closer to the point than any step that rounding noise allows"
CORNER_NEAR = (
    "the second derivative jumps within the smallest step tried (a corner), and where exactly "
    "decides the derivative beyond the threshold"
)
CROWDED = (
    "kinks crowd the point (the steps crossed several, and more may lie closer than any step "
    "that rounding noise allows): its one-sided derivatives do not bound the values a correct "
    "gradient may take here"
)
UNRESOLVED = (
    "a kink sits at the point and no step that rounding noise allows comes near the point's own "
    "resolution: more kinks may lie closer than any step, so its one-sided derivatives do not "
    "bound the values a correct gradient may take here"
)

# Left undecided by one-sided slopes taken down to the smallest step rounding allows
# (:mod:`.close_kinks`): what was not resolved.
SHARED_POINT = (
    "a kink sits at the point and the analytic value lies outside its one-sided derivatives: "
    "where several kinks meet at the point beside a smooth part, a correct gradient can take "
    "such a value, and no step tells how many meet there"
)
CLOSE_NEITHER = (
    "the one-sided slopes change at every step down to the smallest that rounding noise allows, "
    "on both sides: kinks lie closer to the point than any resolvable step, and neither "
    "one-sided derivative at the point is resolved"
)
CLOSE_ONE = (
    "on one side the slope changes at every step down to the smallest that rounding noise "
    "allows (a kink closer to the point than any resolvable step), and the analytic value is "
    "not the derivative seen on the other side: the unresolved side's derivative is not known"
)
CLOSE_BOTH = (
    "both one-sided derivatives are seen down to the smallest step that rounding noise allows, "
    "and the analytic value is neither of them nor between them: several kinks at the point or "
    "closer than any resolvable step can still give it, and none of them is resolved"
)
# Left undecided by the sides taken apart (:mod:`.sides_apart`) where the ladders saw only
# rounding noise: the second look checks it off the point, further off where need be.
OUTSIDE_SIDES = (
    "both one-sided derivatives are resolved and apart (a kink at the point or closer than any "
    "step that rounding noise allows) and the analytic value lies outside them: only several "
    "kinks meeting at the point could give it, and no step tells whether they do"
)
BOTH_SIDES_MOVED = (
    "the loss moves away from its value at the point on both sides by amounts that stay fixed "
    "as the step shrinks (a pole or kink closer to the point than the smallest step tried): "
    "the quotients at those steps say nothing of the slope at the point"
)

NO_SCALE = (
    "the analytic value and the numeric estimate are both exactly 0 and no gradient of the target is "
    "nonzero here (every param 0?), so there is no scale to judge a relative error against: "
    "check it at a point where the gradients are not all 0 (params drawn at random in setup)"
)


def scaleless(status: np.ndarray, reasons: tuple[str | None, ...], scale: np.ndarray) -> tuple[str | None, ...]:
    """``reasons`` with NO_SCALE for undecided coordinates whose scale is 0 (the analytic value,
    the estimate and the target's floor all 0; the floor is then the smallest normal float):
    there the tolerance is 0, and no step or rounding, whatever the reason said, could have
    decided them."""
    which = np.flatnonzero((status == INCONCLUSIVE) & ~(scale > float(np.finfo(np.float64).tiny)))
    if which.size == 0:
        return reasons
    out = list(reasons)
    for k in which.tolist():
        out[k] = NO_SCALE
    return tuple(out)


@dataclass(frozen=True)
class Judged:
    """Verdicts for some coordinates, the estimate each was judged by, and why undecided."""

    status: np.ndarray
    estimate: Estimate
    reasons: tuple[str | None, ...]
    noise_limited: np.ndarray
    # Per coordinate: its ladders' quotients crossed kinks among their steps (None: not known)
    crossed: np.ndarray | None = None

    def pick(self, which: np.ndarray) -> Judged:
        """These verdicts at positions ``which`` only."""
        return Judged(self.status[which], self.estimate.pick(which),
                      tuple(self.reasons[k] for k in which), self.noise_limited[which],
                      None if self.crossed is None else self.crossed[which])

    def merged(self, which: np.ndarray, other: Judged) -> Judged:
        """These verdicts with positions ``which`` replaced by ``other``'s."""
        status = self.status.copy()
        value = self.estimate.value.copy()
        error = self.estimate.error.copy()
        noisy = self.noise_limited.copy()
        reasons = list(self.reasons)
        status[which] = other.status
        value[which] = other.estimate.value
        error[which] = other.estimate.error
        noisy[which] = other.noise_limited
        for k, r in zip(which.tolist(), other.reasons):
            reasons[k] = r
        crossed = None
        if self.crossed is not None or other.crossed is not None:
            crossed = np.zeros(status.size, dtype=bool) if self.crossed is None else self.crossed.copy()
            crossed[which] = False if other.crossed is None else other.crossed
        return Judged(status, Estimate(value, error), tuple(reasons), noisy, crossed)

    def left_for(self, which: np.ndarray, reasons: tuple[str, ...]) -> np.ndarray:
        """Per position ``which``: still inconclusive, for one of ``reasons``."""
        return (self.status[which] == INCONCLUSIVE) & np.array([self.reasons[k] in reasons for k in which], dtype=bool)

    def undecided(self, which: np.ndarray, reasons: tuple[str | None, ...], noise_limited: bool = True) -> Judged:
        """These verdicts with positions ``which`` undecided, each for its reason, their
        estimates kept and their bounds infinite."""
        if which.size == 0:
            return self
        return self.merged(which, Judged(np.full(which.size, INCONCLUSIVE, dtype=self.status.dtype),
                                         Estimate(self.estimate.value[which], np.full(which.size, np.inf)),
                                         reasons, np.full(which.size, noise_limited)))


def verdicts(probe: TensorProbe, a: np.ndarray, est: Estimate, tol: np.ndarray) -> np.ndarray:
    """Pass within the threshold (where the estimate is sharp enough), fail beyond both the
    threshold and SIGNIFICANCE bounds, inconclusive between."""
    with np.errstate(invalid="ignore"):
        err = np.abs(a - est.value)
    status = np.full(a.shape, INCONCLUSIVE, dtype=np.int8)
    # An infinite estimate (a quotient across an overflow) has an infinite tolerance, within
    # which every value lies: it passes nothing.
    status[(err <= tol) & np.isfinite(est.value) & _resolved(probe, est, tol)] = PASS
    status[(err > tol) & (err > SIGNIFICANCE * est.error)] = FAIL
    return status


def _resolved(probe: TensorProbe, est: Estimate, tol: np.ndarray) -> np.ndarray:
    """Where an estimate is sharp enough for a pass. In narrow arithmetic an estimate's bound
    can lie far above the threshold while its value agrees by chance; a bound beyond the
    coordinate's own scale (the estimate does not know the derivative's size) passes
    nothing. (float64 bounds lie far below the threshold wherever a pass is reached.)"""
    if not is_narrow(probe.compute_dtype):
        return np.ones(tol.shape, dtype=bool)
    return est.error <= tol / probe.threshold


NEVER_MOVED = (
    "the loss did not move at any step tried, and backward's slope would first show at steps "
    "wide enough for a steep term to bend back within them (a pole or bend closer than any "
    "step rounding allows): the unmoved loss says nothing of the slope at the point"
)
BOUNDED = (
    "the loss moved by no more than a fixed amount near its rounding at every step tried (a "
    "term steeper than any step that rounding allows): the quotients say nothing of the slope "
    "at the point"
)


def judge_plain(probe: TensorProbe, flat: np.ndarray, est: Estimate) -> Judged:
    """Verdicts from one estimate per coordinate (no kink analysis)."""
    a = probe.a[flat]
    status = verdicts(probe, a, est, probe.tolerance(flat, est.value))
    reasons = tuple(NOISE if s == INCONCLUSIVE else None for s in status)
    return Judged(status, est, reasons, status == INCONCLUSIVE)


CROSSING = (UNSETTLED, NEAR_KINK, CROWDED, UNRESOLVED, SHARED_POINT, CLOSE_NEITHER, CLOSE_ONE, CLOSE_BOTH,
            OUTSIDE_SIDES, BOUNDED)


def crossed_failures(probe: TensorProbe, flat: np.ndarray, judged: Judged, most: int) -> np.ndarray:
    """Positions (in ``flat``) of the failures whose ladders crossed kinks among their steps,
    of float64 code judged on its own run, the most decisive first, at most ``most`` (none
    for other code, or where the ladders did not say)."""
    if (probe.compute_dtype != np.dtype(np.float64) or probe.narrow is not None or probe.own_code is not None
            or judged.crossed is None):
        return np.zeros(0, dtype=np.int64)
    failed = np.flatnonzero((judged.status == FAIL) & judged.crossed)
    return most_decisive(probe, flat, judged, failed)[:most]


def as_kinks(judged: Judged, which: np.ndarray) -> Judged:
    """``judged`` with the coordinates at positions ``which`` judged `kink`."""
    if which.size == 0:
        return judged
    status = judged.status.copy()
    status[which] = KINK
    return Judged(status, judged.estimate, judged.reasons, judged.noise_limited, judged.crossed)


def most_decisive(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray) -> np.ndarray:
    """Positions ``which`` (in ``flat``) ordered by how many of its bounds each one's analytic
    value lies from its estimate in ``judged``, the most first (ties in their order)."""
    est = judged.estimate.pick(which)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        decisive = np.abs(probe.a[flat[which]] - est.value) / np.maximum(est.error, 1e-300)
    return which[np.argsort(-np.nan_to_num(decisive, nan=0.0), kind="stable")]


def looked_at_again(status: np.ndarray, reasons: tuple[str | None, ...]) -> np.ndarray:
    """The coordinates a second look off the kinks checks (see offpoint.py): those at a kink,
    and those left undecided because the steps kept crossing kinks (an estimate that does
    not settle, a kink closer than any step), where a wrong gradient can hide just as well."""
    crossing = np.array([r in CROSSING or r == BOTH_SIDES_MOVED for r in reasons], dtype=bool)
    return (status == KINK) | ((status == INCONCLUSIVE) & crossing)
