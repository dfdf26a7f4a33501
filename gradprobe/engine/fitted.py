"""Central quotients at many steps fitted as one curve, for float32 code judged on its own
arithmetic whose measured rounding (:mod:`.own_rounding`) still hides the threshold at every
single step and in the averaged rows (:mod:`.averaged`).

Along a coordinate where the loss is smooth, the central quotient at step s is
D(s) = f' + c2 s**2 + c4 s**4 + ... (Taylor) plus the rounding of its two loss values, of
spread sqrt(2) sigma / (2 s) (sigma: one loss value's). STEPS steps evenly spaced over
[s_top / SPAN, s_top] (s_top the widest step within the reach the coordinate's rounding was
measured over and the params' scale), neighbours apart by at least the move that changes the
loss by CHANGE_ULPS units of its last place (as :mod:`.own_rounding` requires of its moves:
their roundings are then independent), give D at each; a least-squares fit of
f' + c2 s**2 + c4 s**4, each quotient weighted by its rounding, reads f' with a standard error
STEPS / 3 times smaller than one quotient's rounding allows at the same steps, roughly.

sigma is the larger of what the fit's residuals show and the coordinate's measured rounding
over FIGURE_SIGMAS (that figure is the largest of nine fourth differences, about seven to
eight times sigma). The bound is SIGNIFICANCE standard errors plus the change of f' when the
fit takes one more term (c6 s**6). Checked on the coordinate before any use: the residuals
spread no more than RESIDUAL_LIMIT times sigma allows (the quotients follow the curve: a kink
or a bend within the steps shows), the fit with one more term reads the same f' within
SIGNIFICANCE of its own standard error, and the fits on every other step (two halves, each
its own roundings) agree within theirs; the loss is smooth across the steps beyond what the
quotients show (:mod:`.smooth_across`: the pairs' even part shows no kink among them, and the
quotients taken before at smaller steps continue the curve), and a failure also lies beyond
the shift a kink the even part leaves unseen could make. A verdict comes from here only at a
bound within PASS_SHARE of the tolerance (a pass must tell an error of 1.5 thresholds from none): a pass
within the tolerance, a failure beyond both it and SIGNIFICANCE bounds. The fit is tried over
the widest steps within reach and over half and a quarter of them (NARROWER: a loss that
bends beyond the quartic over the widest keeps to it over narrower ones), the smallest bound
kept. STEPS pairs per coordinate and span, for at most FITTED coordinates per tensor.
"""

from __future__ import annotations

import numpy as np

from ..common.classes import dataclass
from ..common.status import FAIL, PASS
from .ladder import Estimate
from .probe import TensorProbe
from .refine import Taken
from .smooth_across import continued, even_part, smaller_central, unseen_kink
from .verdict import NOISE, SIGNIFICANCE, Judged

STEPS = 64  # pairs per coordinate
SPAN = 8.0  # the steps span s_top / SPAN to s_top
CHANGE_ULPS = 2.0  # neighbouring steps change the loss by this many units of its last place at least
FIGURE_SIGMAS = 8.0  # the measured rounding figure over this: one loss value's spread, at least
RESIDUAL_LIMIT = 2.0  # the residuals' root mean square, in units of their expected spread, at most
PASS_SHARE = 0.5  # a pass needs its bound within this share of the tolerance
FITTED = 32  # coordinates per tensor
LEAST = 24  # steps at least (fewer fit apart: left as they were)
NARROWER = (1.0, 2.0, 4.0)  # fits over the widest steps within reach, and over half and a quarter of them


def fitted_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
                  rounding: np.ndarray, reach: np.ndarray, widest: np.ndarray, taken: list[Taken],
                  why: tuple[str, ...] = (NOISE,)) -> Judged:
    """``judged`` with coordinates ``which`` (positions in ``flat``; their measured rounding,
    its reach and the widest step the scale allows) still undecided for rounding judged on
    the fitted curve where its bound lies within PASS_SHARE of the tolerance (the central
    quotients ``taken`` before at smaller steps must continue it). ``why``: the reasons of
    the undecided coordinates judged (a kink the wide steps may hold among them: the fit
    checks for one itself)."""
    left = np.flatnonzero(judged.left_for(which, why) & np.isfinite(rounding))[:FITTED]
    if left.size == 0:
        return judged
    where = flat[which[left]]
    widest_top = np.minimum(reach[left], widest[left])
    eps = float(np.finfo(probe.compute_dtype).eps)
    move = CHANGE_ULPS * eps * abs(probe.f0) / np.maximum(np.abs(probe.a[where]), 1e-300)
    value, bound, unseen = np.full(where.size, np.nan), np.full(where.size, np.inf), np.full(where.size, np.inf)
    for narrower in NARROWER:
        top = widest_top / narrower
        got = _fitted_at(probe, where, top, move, rounding[left] / FIGURE_SIGMAS, taken)
        better = got[1] < bound
        value, bound, unseen = (np.where(better, g, v) for g, v in zip(got, (value, bound, unseen)))
    use = np.flatnonzero(np.isfinite(bound))
    if use.size == 0:
        return judged
    value, bound, unseen = value[use], bound[use], unseen[use]
    a = probe.a[where[use]]
    tol = probe.tolerance(where[use], value)
    with np.errstate(invalid="ignore"):
        sharp = bound <= PASS_SHARE * tol
        passed = (np.abs(a - value) <= tol) & sharp
        # A failure also lies beyond what a kink among the steps that the even part leaves
        # unseen could move the derivative by (:func:`.smooth_across.unseen_kink`).
        failed = (np.abs(a - value) > tol) & (np.abs(a - value) > SIGNIFICANCE * bound + unseen) & sharp
    k = np.flatnonzero(passed | failed)
    if k.size == 0:
        return judged
    status = np.where(passed[k], PASS, FAIL).astype(judged.status.dtype)
    mine = Judged(status, Estimate(value[k], bound[k]), tuple(None for _ in k), np.zeros(k.size, dtype=bool))
    return judged.merged(which[left[use[k]]], mine)


def _fitted_at(probe: TensorProbe, where: np.ndarray, top: np.ndarray, move: np.ndarray,
               sigma_floor: np.ndarray, taken: list[Taken]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """f' and its bound at coordinates ``where`` from STEPS pairs (fewer where neighbours
    would lie within ``move``; none below LEAST) over [top / SPAN, top], and how far a kink
    among the steps that the pairs' even part leaves unseen could put the derivative from
    the fit's f'; infinite bounds where no fit was made or a check failed (the even part
    shows a kink, the central quotients ``taken`` before at smaller steps leave the curve)."""
    value, bound, unseen = np.full(where.size, np.nan), np.full(where.size, np.inf), np.full(where.size, np.inf)
    with np.errstate(divide="ignore", invalid="ignore"):  # no move: as many steps as fit
        count = np.minimum(STEPS, np.floor(top * (1.0 - 1.0 / SPAN) / move) + 1)
    use = np.flatnonzero(np.nan_to_num(count) >= LEAST)
    if use.size == 0:
        return value, bound, unseen
    steps = np.full((use.size, STEPS), np.nan)  # fewer steps where the moves need it, evenly spread
    for r, i in enumerate(use):
        steps[r, :int(count[i])] = np.linspace(top[i] / SPAN, top[i], int(count[i]))
    asked = np.isfinite(steps)
    coords = np.broadcast_to(where[use][:, None], steps.shape)
    p = probe.pairs(coords[asked], steps[asked])
    d, s, even = np.full(steps.shape, np.nan), np.full(steps.shape, np.nan), np.full(steps.shape, np.nan)
    d[asked] = p.central
    s[asked] = 0.5 * (p.h_plus + p.h_minus)
    even[asked] = even_part(p, probe.f0)
    smaller = smaller_central(where[use], top[use] / SPAN, taken, probe.f0)
    for r, i in enumerate(use):
        got = _fit(d[r, asked[r]], s[r, asked[r]], float(sigma_floor[i]))
        if got is None:
            continue
        fit, sigma = got
        jump = unseen_kink(even[r, asked[r]], s[r, asked[r]], sigma, RESIDUAL_LIMIT)
        if jump is None:
            continue  # a kink among the steps: the odd part alone may not show it
        if not continued(fit.at, fit.bound, smaller[r]):
            continue  # the quotients at smaller steps leave the curve: it is not the loss's there
        value[i], bound[i], unseen[i] = fit.value, fit.bound, jump * (1.0 + abs(fit.kink_pull))
    return value, bound, unseen


@dataclass(frozen=True)
class _Fit:
    """A fitted curve D(s) = value + c2 s**2 + c4 s**4 (``coef`` in powers of (s / top)**2) and
    its bound."""

    value: float
    bound: float
    coef: np.ndarray
    top: float
    kink_pull: float  # what a kink of unit slope jump just inside the smallest step adds to value

    def at(self, s: np.ndarray) -> np.ndarray:
        u = (np.asarray(s, dtype=np.float64) / self.top) ** 2
        return self.coef[0] + self.coef[1] * u + self.coef[2] * u**2


def _fit(d: np.ndarray, s: np.ndarray, sigma_floor: float) -> tuple[_Fit, float] | None:
    """The fitted curve with f' and its bound from quotients ``d`` at steps ``s`` (see the
    module's note), and one loss value's rounding sigma; None where a check fails."""
    if d.size < LEAST or not (np.all(np.isfinite(d)) and np.all(np.diff(s) > 0)):
        return None
    weight = s * np.sqrt(2.0)  # 1 / each quotient's rounding, in units of sigma
    value, se, resid, coef = _least_squares(d, s, weight, 3)
    value6, se6, _, _ = _least_squares(d, s, weight, 4)
    seen = float(np.sqrt(np.sum((resid * weight) ** 2) / (d.size - 3)))  # sigma as the residuals show
    sigma = max(seen, sigma_floor)
    if not (seen <= RESIDUAL_LIMIT * sigma_floor and np.isfinite(value) and np.isfinite(value6)):
        return None
    if abs(value6 - value) > SIGNIFICANCE * se6 * sigma:
        return None
    even, se_even, _, _ = _least_squares(d[0::2], s[0::2], weight[0::2], 3)
    odd, se_odd, _, _ = _least_squares(d[1::2], s[1::2], weight[1::2], 3)
    if abs(even - odd) > SIGNIFICANCE * np.hypot(se_even, se_odd) * sigma:
        return None
    # A kink at a distance e below every step adds jump * e / s to each quotient (its value's
    # share of the fit: at most the fit of s.min() / s).
    pull = _least_squares(s.min() / s, s, weight, 3)[0]
    return _Fit(value, SIGNIFICANCE * se * sigma + abs(value6 - value), coef, float(s.max()), pull), sigma


def _least_squares(d: np.ndarray, s: np.ndarray, weight: np.ndarray,
                   terms: int) -> tuple[float, float, np.ndarray, np.ndarray]:
    """f' from D(s) = f' + c2 s**2 + ... (``terms`` coefficients) weighted by ``weight``, its
    standard error per unit sigma, the residuals and the coefficients (in powers of
    (s / s.max())**2)."""
    u = (s / s.max()) ** 2  # scaled: a well-conditioned design
    x = np.stack([u**k for k in range(terms)], axis=1)
    xw = x * weight[:, None]
    coef, *_ = np.linalg.lstsq(xw, d * weight, rcond=None)
    cov = np.linalg.pinv(xw.T @ xw)
    return float(coef[0]), float(np.sqrt(max(cov[0, 0], 0.0))), d - x @ coef, coef


__all__ = ["fitted_passes"]
