"""Sides seen beyond kinks closer than any step: secant slopes between the close look's steps.

Where kinks lie closer to the point than the smallest step that rounding noise allows, on both
sides, every one-sided quotient averages across them and :mod:`.close_kinks` sees neither
side. Along a piecewise-linear loss, beyond the nearest kinks on a side the loss moves by
``D(h) = S h + C`` (``S`` the slope there, ``C = -sum(jump * distance)`` over the kinks
crossed, the same at every such step), and the quotients ``D(h) / h = S + C / h`` change at
every step. The secant between two steps, ``(D(h2) - D(h1)) / (h2 - h1)``, is ``S`` exactly:
``C`` cancels, and so does the loss at the point. Its rounding is that of a one-sided quotient
at the step ``h2 - h1``.

A side's *secant run*: SECANTS consecutive secants (steps spanning 2**SECANTS-fold, as a run
of the close look's) agree within the tolerance, the widest with a noise of at most
NOISE_SHARE of it: the loss is linear there as far as rounding shows, with the slope ``S``.
The first such run from the point is the slope just beyond the kinks no step resolves. Those
kinks are *crossed* where the quotient at the run's widest step differs from ``S`` beyond the
tolerance and the rounding of both (``C`` is there).

At steps that cannot resolve them, the kinks crossed on both sides act as one kink at the
point with the two slopes beyond as its sides, and a value between those is one such a kink
gives (the rule at every kink the ladders see, :mod:`.kinks`; for a convex loss, whose slopes
only grow, the derivative at the point always lies there). So, where the close look sees
neither side: both sides' runs found, kinks crossed on both, the loss moving near the point
no faster than slopes of the size seen (every quotient up to the runs within REACH times the
largest of the slopes and the value: a kink's quotients average the slopes around it, while
a pole or a jump in the loss moves it by a fixed amount, and its quotients grow like 1 / h),
and the analytic value between the slopes (within the tolerance): a kink.

Nothing else changes here. A value off the slopes stays undecided: kinks hidden below every
step can give any value (test_kink_unresolved.py). A value between them may still be wrong
(nothing at these steps can tell); the second look off the point (:mod:`.offpoint`) checks
every kink verdict again where the kinks have moved away, and fails a wrong backward there.
Where one side is seen at the point (its quotients steady), the value must be that side's or
one a kink at the point gives between both seen sides (:mod:`.close_kinks`); a slope beyond
kinks on the other side does not widen that.
"""

from __future__ import annotations

import numpy as np

from ..common.classes import dataclass
from .ladder import NOISE_UNITS, SAFETY, Estimate

SECANTS = 3  # secants in a run: between 4 steps spanning 8-fold
NOISE_SHARE = 0.5  # the run's widest secant has a noise of at most half the tolerance
REACH = 4.0  # no quotient up to the runs is more than 4 times the largest slope or value


@dataclass(frozen=True)
class SecantSide:
    """One side's first secant run per coordinate: found or not, its slope (the widest
    secant) with a bound (the run's spread and rounding), and whether kinks were seen
    between the point and the run (the quotient there is not the slope)."""

    found: np.ndarray
    slope: Estimate
    crossed: np.ndarray
    reach: np.ndarray  # the largest one-sided quotient's size up to the run's widest step


def secant_side(moved: np.ndarray, h: np.ndarray, noise: np.ndarray, tol: np.ndarray) -> SecantSide:
    """``moved``: how far the loss moved from its value at the point along one side, signed
    as a slope's numerator (``f(x + h) - f(x)`` on the right, ``f(x) - f(x - h)`` on the
    left), at the distances ``h`` really moved (rows of ascending steps, coordinates);
    ``noise``: one loss value's rounding there; ``tol``: the tolerance the slopes are judged
    at (their own size)."""
    rows, n = moved.shape
    width = np.diff(h, axis=0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        secant = np.diff(moved, axis=0) / width  # row k - 1: between steps k - 1 and k
        secant_noise = np.where(width > 0, (noise[1:] + noise[:-1]) / width, np.inf)  # steps that did not grow
        quotient = moved / h
        quotient_noise = 2.0 * noise / h
    found = np.zeros(n, dtype=bool)
    value, error = np.full(n, np.nan), np.full(n, np.inf)
    crossed = np.zeros(n, dtype=bool)
    reach = np.full(n, np.inf)
    for k in range(SECANTS - 1, rows - 1):
        w = secant[k - SECANTS + 1:k + 1]
        spread = w.max(axis=0) - w.min(axis=0)
        here = (spread <= tol) & (secant_noise[k] <= NOISE_SHARE * tol) & np.isfinite(spread) & ~found
        value = np.where(here, secant[k], value)
        error = np.where(here, SAFETY * spread + NOISE_UNITS * secant_noise[k], error)
        # The quotient at the run's widest step (row k + 1) is the slope plus C / h.
        off = np.abs(quotient[k + 1] - secant[k])
        crossed = np.where(here, off > tol + NOISE_UNITS * (quotient_noise[k + 1] + secant_noise[k]), crossed)
        reach = np.where(here, np.abs(quotient[:k + 2]).max(axis=0), reach)
        found |= here
    return SecantSide(found, Estimate(value, error), crossed, reach)


def kink_beyond(left: SecantSide, right: SecantSide, a: np.ndarray, tol_a: np.ndarray
                ) -> tuple[np.ndarray, Estimate]:
    """Per coordinate: both sides' secant runs found, kinks crossed on both, every quotient up
    to the runs within REACH times the largest of the slopes and the value, and the analytic
    value ``a`` between the slopes (within ``tol_a``): a kink (module's note). And the slope
    nearer the value (the estimate reported)."""
    lv, rv = left.slope.value, right.slope.value
    with np.errstate(invalid="ignore"):
        inside = (a >= np.minimum(lv, rv) - tol_a) & (a <= np.maximum(lv, rv) + tol_a)
        size = np.maximum(np.maximum(np.abs(lv), np.abs(rv)), np.abs(a))
        continuous = np.maximum(left.reach, right.reach) <= REACH * size
    kink = left.found & right.found & left.crossed & right.crossed & continuous & inside
    use_left = np.abs(a - lv) <= np.abs(a - rv)
    return kink, Estimate.where(use_left, left.slope, right.slope)
