"""One side of a coordinate fitted as one curve, for float32 code judged on its own arithmetic
that rounding, or a kink within the wide steps, still leaves undecided once the central
quotients were fitted (:mod:`.fitted`).

A kink beside the point (|a (p - k)| with p - k small, a Huber corner) breaks every central
quotient at the steps rounding needs, while the loss on the other side can stay linear, or
smooth, out to the params' scale. :mod:`.one_side` reads that side from windows of three
steps: each bound carries the rounding of single quotients several times over, often 10 or
more tolerances where one step alone, against mpmath, leaves a tenth of one.

Here the loss values themselves are fitted: on each side, POINTS moves t evenly spread over
(0, top] (top the widest step within the reach the coordinate's rounding was measured over
and the params' scale; neighbours apart by at least the move that changes the loss by
CHANGE_ULPS units of its last place, so their roundings are independent, as
:mod:`.own_rounding` requires of its moves) and the point itself: f(x + t) = f0 + f' t +
c2 t**2 + ... (Taylor) plus each value's rounding, of spread sigma. A least-squares polynomial
in t of degree 1, 2 or 3 (its constant free: the point's own value rounds as any other) reads
f' as its slope, with a standard error per unit sigma from the design. sigma is the larger of
what the fit's residuals show and the coordinate's measured rounding over FIGURE_SIGMAS (as
:mod:`.fitted`). The bound is SIGNIFICANCE standard errors plus the change of f' when the fit
takes one more term. Checked on the coordinate before any use: the residuals spread no more
than RESIDUAL_LIMIT times sigma allows (a kink or a bend within the side shows), the fit with
one more term reads the same f' within SIGNIFICANCE of its own standard error, the fits on
every other point agree within theirs, and every one-sided quotient taken before on that side
at a step below the first move lies within its rounding and the bound of the estimate (a kink
nearer the point than the first move would move it). The fit is tried over all the moves and
over the nearer half of them (NARROWER: a side that bends, or meets another corner, within
top keeps to the model over less), the smallest bound over the spans, the degrees and both
sides kept.

Passes only, as one side's estimates give them (:mod:`.one_side`; a failure needs the central
model or the kink logic, as a kink nearer than every move makes one side's slope the other's),
and only at a bound within PASS_SHARE of the tolerance, as :mod:`.fitted`'s: a pass must tell
an error of 1.5 thresholds from none. 2 POINTS calls per coordinate, for at most FITTED
coordinates per tensor.
"""

from __future__ import annotations

import numpy as np

from ..common.errors import BadOutputError, UserCodeError
from ..common.status import PASS
from .fitted import CHANGE_ULPS, FIGURE_SIGMAS, FITTED, PASS_SHARE, RESIDUAL_LIMIT
from .ladder import Estimate
from .one_side import smaller_quotients
from .probe import TensorProbe
from .refine import Taken
from .verdict import SIGNIFICANCE, Judged
from .wide_steps import WIDE_NOISE
from .widened import as_seen

POINTS = 32  # moves per side
LEAST = 16  # moves at least (where the loss's last place needs fewer, none)
DEGREES = (1, 2, 3)  # the polynomials tried, each checked against one degree more
NARROWER = (1, 2)  # fits over all the moves and over the nearer half of them


def side_fitted_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
                       rounding: np.ndarray, reach: np.ndarray, widest: np.ndarray,
                       taken: list[Taken], reasons: tuple[str, ...]) -> Judged:
    """``judged`` with coordinates ``which`` (positions in ``flat``; their measured rounding, its
    reach and the widest step the scale allows) still undecided for one of ``reasons`` passed
    where one side's fitted estimate agrees with the analytic value within the threshold at a
    bound within PASS_SHARE of the tolerance (see the module's note)."""
    left = np.flatnonzero(judged.left_for(which, reasons) & np.isfinite(rounding))[:FITTED]
    if left.size == 0:
        return judged
    where = flat[which[left]]
    top = np.minimum(reach[left], widest[left])
    value, bound = side_fits(probe, where, top, rounding[left] / FIGURE_SIGMAS, taken)
    a = probe.a[where]
    tol = probe.tolerance(where, np.nan_to_num(value))
    with np.errstate(invalid="ignore"):
        passed = (np.abs(a - value) <= tol) & (bound <= PASS_SHARE * tol)
    k = np.flatnonzero(passed)
    if k.size == 0:
        return judged
    mine = Judged(np.full(k.size, PASS, dtype=judged.status.dtype), Estimate(value[k], bound[k]),
                  tuple(None for _ in k), np.zeros(k.size, dtype=bool))
    return judged.merged(which[left[k]], mine)


def side_fits(probe: TensorProbe, where: np.ndarray, top: np.ndarray, sigma_floor: np.ndarray,
              taken: list[Taken]) -> tuple[np.ndarray, np.ndarray]:
    """f' and its bound at coordinates ``where`` from the better side's fit over (0, ``top``]
    (infinite bounds where no fit was made or its checks failed)."""
    n = where.size
    value, bound = np.full(n, np.nan), np.full(n, np.inf)
    eps = float(np.finfo(probe.compute_dtype).eps)
    move = CHANGE_ULPS * eps * abs(probe.f0) / np.maximum(np.abs(probe.a[where]), 1e-300)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        count = np.minimum(POINTS, np.floor(np.nan_to_num(top / move, nan=0.0, posinf=POINTS)))
    use = np.flatnonzero((count >= LEAST) & np.isfinite(top) & (top > 0))
    if use.size == 0:
        return value, bound
    x = probe.x[where[use]].astype(np.float64)
    base = as_seen(probe.x[where[use]], probe.compute_dtype)
    first = top[use] / count[use]
    smaller = smaller_quotients(probe, where[use], first, taken)  # the quotients below the first move
    for sign, below in ((1.0, smaller[0]), (-1.0, smaller[1])):
        points, seen = [], []
        with np.errstate(over="ignore", invalid="ignore"):
            for j in range(1, int(count[use].max()) + 1):
                moved = (x + sign * np.minimum(j, count[use]) * first).astype(probe.x.dtype)
                points.append(moved)
                seen.append(as_seen(moved, probe.compute_dtype) - base)
        try:
            values = probe.evaluator.single_moves(probe.tensor, where[use], tuple(points))
        except (UserCodeError, BadOutputError):
            continue  # a move outside forward's domain: this side says nothing
        t = np.stack(seen, axis=1)
        for r, i in enumerate(use):
            m = int(count[i])
            for part in NARROWER:
                k = m // part
                got = _fit(np.concatenate([[0.0], t[r, :k]]), np.concatenate([[probe.f0], values[r, :k]]),
                           float(sigma_floor[i]))
                if got[1] < bound[i] and all(abs(q - got[0]) <= WIDE_NOISE * e + got[1] for q, e in below[r]):
                    value[i], bound[i] = got
    return value, bound


def _fit(t: np.ndarray, f: np.ndarray, sigma_floor: float) -> tuple[float, float]:
    """f' and its bound from loss values ``f`` at moves ``t`` (the point's own first, at 0);
    an infinite bound where every degree's check fails (see the module's note)."""
    if t.size < LEAST or not (np.all(np.isfinite(f)) and np.all(np.isfinite(t)) and np.all(np.diff(np.abs(t)) > 0)):
        return float("nan"), float("inf")
    best = (float("nan"), float("inf"))
    for degree in DEGREES:
        value, se, resid = _least_squares(t, f, degree)
        more, se_more, _ = _least_squares(t, f, degree + 1)
        seen = float(np.sqrt(np.sum(resid**2) / (t.size - degree - 1)))
        sigma = max(seen, sigma_floor)
        if not (seen <= RESIDUAL_LIMIT * sigma_floor and np.isfinite(value) and np.isfinite(more)):
            continue
        if abs(more - value) > SIGNIFICANCE * se_more * sigma:
            continue
        even, se_even, _ = _least_squares(t[0::2], f[0::2], degree)
        odd, se_odd, _ = _least_squares(t[1::2], f[1::2], degree)
        if abs(even - odd) > SIGNIFICANCE * np.hypot(se_even, se_odd) * sigma:
            continue
        b = SIGNIFICANCE * se * sigma + abs(more - value)
        if b < best[1]:
            best = (value, b)
    return best


def _least_squares(t: np.ndarray, f: np.ndarray, degree: int) -> tuple[float, float, np.ndarray]:
    """The slope at 0 of the polynomial of ``degree`` fitted to ``f`` at ``t``, its standard
    error per unit sigma, and the residuals."""
    scale = float(np.max(np.abs(t)))
    u = t / scale  # a well-conditioned design
    x = np.stack([u**k for k in range(degree + 1)], axis=1)
    centre = float(np.mean(f))  # the loss's large constant out of the fit's arithmetic
    coef, *_ = np.linalg.lstsq(x, f - centre, rcond=None)
    cov = np.linalg.pinv(x.T @ x)
    return float(coef[1]) / scale, float(np.sqrt(max(cov[1, 1], 0.0))) / scale, (f - centre) - x @ coef


__all__ = ["side_fitted_passes", "side_fits"]
