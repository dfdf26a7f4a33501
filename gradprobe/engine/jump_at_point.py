"""Failures at coordinates whose ladders crossed kinks, where one-sided quotients at the
smallest steps show the point itself on a kink with the analytic value between its sides
(float64 code).

Several ReLU residuals exactly at 0 and more within 1e-10 along a coordinate (kinks-850997:
three at the point, four from 2e-11 to 6e-11 away, three from 2e-9 to 3e-9) leave the
ladders, whose steps stop where the loss's rounding allows, reading the slopes beyond those
kinks: a central value of 5.857 +- 0.13 against the correct 0.614, which the kink at the point
allows (its one-sided derivatives are -0.202 and 6.141). Backward just beside the point
(sliver.py) reads the slopes between the close kinks, not those at the point.

Between the point and the nearest kink on either side the loss is linear, and one-sided
quotients at steps from SPACINGS spacings of x (of the tensor's rms where x is smaller),
doubling ROWS - 1 times, read each side to within the loss's rounding (two loss values'
noise over the step): a side is *seen* where
STEADY consecutive rows agree within their rounding, its value the widest step's quotient of
the first such run. Where both sides are seen, apart by more than the tolerance and their
bounds (a jump resolved), and the analytic value lies between them (within the tolerance and
their bounds), the coordinate is a kink, as at a kink the ladders see (kinks.py), and the
second look off the point (offpoint.py) checks it again. A smooth coordinate, however sharp
its bend, shows no jump at these steps, and its failure stands; so does a value outside the
sides. At most LOOKED a tensor, the most decisive first; 2 ROWS loss calls each.
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe
from .verdict import Judged, as_kinks, crossed_failures

LOOKED = 8  # failed coordinates per tensor looked at
SPACINGS = 64.0  # the smallest step, in spacings of x
ROWS = 10  # steps from SPACINGS spacings of x, doubling: a 512-fold span
STEADY = 3  # consecutive rows agreeing within their rounding: a side seen (a 4-fold span)


def jump_kinks(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """``judged`` with the failures the module's note names judged `kink`."""
    if probe.x.dtype != np.dtype(np.float64):
        return judged
    failed = crossed_failures(probe, flat, judged, LOOKED)
    if failed.size == 0:
        return judged
    where = flat[failed]
    n = where.size
    # spacings of x, or of the tensor's rms where x is far smaller (a bias at 0)
    smallest = SPACINGS * np.spacing(np.maximum(np.abs(probe.x[where]), probe.x_scale))
    asked = smallest[None, :] * 2.0 ** np.arange(ROWS)[:, None]
    p = probe.pairs(np.tile(where, ROWS), asked.reshape(-1))
    h_plus, h_minus = p.h_plus.reshape(ROWS, n), p.h_minus.reshape(ROWS, n)
    rounding = p.noise.reshape(ROWS, n) + probe.loss_noise(np.full(n, probe.f0))[None, :]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        right = _seen((p.f_plus.reshape(ROWS, n) - probe.f0) / h_plus, rounding / h_plus, h_plus, asked)
        left = _seen((probe.f0 - p.f_minus.reshape(ROWS, n)) / h_minus, rounding / h_minus, h_minus, asked)
    (r, r_err), (l_, l_err) = right, left
    a = probe.a[where]
    tol = probe.tolerance(where, a)
    lo, hi = np.minimum(r, l_), np.maximum(r, l_)
    lo_err, hi_err = np.where(r <= l_, r_err, l_err), np.where(r <= l_, l_err, r_err)
    with np.errstate(invalid="ignore"):
        jump = hi - lo > tol + lo_err + hi_err
        between = (a >= lo - tol - lo_err) & (a <= hi + tol + hi_err)
    return as_kinks(judged, failed[jump & between])


def _seen(q: np.ndarray, noise: np.ndarray, moved: np.ndarray, asked: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per column, a side's value and bound from its quotients ``q`` (rows ascending in step),
    rounding ``noise`` each: the widest step's quotient of the first STEADY rows in a row that
    agree within their rounding (their spread and the widest's rounding its bound); NaN and inf
    where there is none. Rows not moved as asked (a domain edge) or not finite break a run."""
    rows, n = q.shape
    value, bound = np.full(n, np.nan), np.full(n, np.inf)
    usable = np.isfinite(q) & np.isfinite(noise) & (np.abs(moved - asked) <= 1e-6 * asked)
    for j in range(rows - STEADY + 1):
        window = slice(j, j + STEADY)
        ok = np.all(usable[window], axis=0) & np.isnan(value)
        if not ok.any():
            continue
        spread = np.max(q[window], axis=0) - np.min(q[window], axis=0)
        steady = ok & (spread <= np.max(noise[window], axis=0))
        top = j + STEADY - 1
        value[steady], bound[steady] = q[top, steady], spread[steady] + noise[top, steady]
    return value, bound


__all__ = ["jump_kinks"]
