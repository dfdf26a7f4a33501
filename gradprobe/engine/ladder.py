"""Extrapolating difference quotients taken at a ladder of steps, with error bounds (pure).

Quotients at steps h, h/r, h/r**2, ... tend to the derivative as the step shrinks:
central ones in even powers of h, one-sided ones in every power. Richardson's tableau
removes those powers one by one (Ridders, "Accurate computation of F'(x) and F'(x)F''(x)",
Advances in Engineering Software 4(2), 1982); each entry's error is bounded by its distance
to its neighbours (two or three of them, times a safety factor) plus the rounding noise
the tableau carries, propagated through the tableau's coefficients. The answer is the entry
with the smallest bound. tests/test_estimates.py checks that the bound holds against mpmath
over functions, points and scales that span many decades.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SAFETY = 2.0  # the neighbours' spread is multiplied by this
NOISE_UNITS = 2.0  # and the propagated rounding noise by this


@dataclass(frozen=True)
class Estimate:
    """A derivative estimate per coordinate and a bound on its error."""

    value: np.ndarray
    error: np.ndarray

    def pick(self, which: np.ndarray) -> Estimate:
        return Estimate(self.value[which], self.error[which])

    @staticmethod
    def where(mask: np.ndarray, first: Estimate, second: Estimate) -> Estimate:
        """Per coordinate, ``first`` where ``mask`` holds, else ``second``."""
        return Estimate(np.where(mask, first.value, second.value),
                        np.where(mask, first.error, second.error))

    @staticmethod
    def better(first: Estimate, second: Estimate) -> Estimate:
        """Per coordinate, the estimate with the smaller error bound."""
        return Estimate.where(second.error < first.error, second, first)


def settled_rows(quotients: np.ndarray, noise: np.ndarray, shrink: float) -> np.ndarray:
    """Per row and coordinate: the quotients have reached the regime the tableau assumes.

    There, successive differences of the quotients shrink by ``shrink`` (1/4 for central
    quotients halving their step, 1/2 for one-sided ones) until rounding noise takes over.
    A step far larger than the scale on which the loss bends gives differences that do not
    shrink so; entries built on such rows could agree by chance and are not trusted.
    """
    rows, n = quotients.shape
    trusted = np.zeros((rows, n), dtype=bool)
    limit = 0.5 * (1.0 + shrink)
    with np.errstate(invalid="ignore"):
        for k in range(1, rows):
            step = np.abs(quotients[k] - quotients[k - 1])
            noisy = step <= 2.0 * NOISE_UNITS * (noise[k] + noise[k - 1])
            if k == 1:
                trusted[k] = noisy
                continue
            before = np.abs(quotients[k - 1] - quotients[k - 2])
            trusted[k] = noisy | (step <= limit * before)
    return trusted


def tableau(quotients: np.ndarray, noise: np.ndarray, ratio: float, order_step: int) -> Estimate:
    """Richardson's tableau over rows of ``quotients`` (steps shrinking by ``ratio`` per row).

    ``order_step`` is 2 for central quotients (even powers of h) and 1 for one-sided ones.
    ``noise`` holds each quotient's rounding noise. Both are shaped (rows, coordinates).
    """
    rows, n = quotients.shape
    trusted = settled_rows(quotients, noise, ratio**-order_step)
    best = quotients[0].copy()
    error = np.full(n, np.inf)
    prev_t: list[np.ndarray] = []
    prev_n: list[np.ndarray] = []
    before_t0 = quotients[0]  # the first quotient two rows up
    with np.errstate(invalid="ignore", over="ignore"):
        for k in range(rows):
            cur_t = [quotients[k]]
            cur_n = [noise[k]]
            if k >= 1:
                # A smaller step's quotient is nearer the derivative than the larger one's,
                # wherever the tableau's assumptions hold: one that moves further from the
                # estimate taken so far than the previous quotient (beyond noise) shows that
                # the estimate's agreement was a coincidence of orders, not convergence.
                away = np.abs(cur_t[0] - best) - np.abs(prev_t[0] - best)
                contradicted = away > error + NOISE_UNITS * (cur_n[0] + prev_n[0])
                error = np.where(contradicted, SAFETY * np.abs(cur_t[0] - best) + error, error)
                spread = np.abs(cur_t[0] - prev_t[0])
                if k >= 2:
                    spread = np.maximum(spread, np.abs(cur_t[0] - before_t0))
                bound = SAFETY * spread + NOISE_UNITS * cur_n[0]
                take = (bound < error) & trusted[k]
                best = np.where(take, cur_t[0], best)
                error = np.where(take, bound, error)
            factor = 1.0
            for j in range(1, k + 1):
                factor *= ratio**order_step
                value = cur_t[j - 1] + (cur_t[j - 1] - prev_t[j - 1]) / (factor - 1.0)
                carried = cur_n[j - 1] * factor / (factor - 1.0) + prev_n[j - 1] / (factor - 1.0)
                spread = np.maximum(np.abs(value - cur_t[j - 1]), np.abs(value - prev_t[j - 1]))
                if j < k:  # the same order one step larger: a third, independent neighbour
                    spread = np.maximum(spread, np.abs(value - prev_t[j]))
                bound = SAFETY * spread + NOISE_UNITS * carried
                # Two neighbours can agree by a cancellation of orders; only entries that
                # a third neighbour confirms are candidates.
                take = (bound < error) & trusted[k] & ((j < k) | (k >= 2))
                best = np.where(take, value, best)
                error = np.where(take, bound, error)
                cur_t.append(value)
                cur_n.append(carried)
            if prev_t:
                before_t0 = prev_t[0]
            prev_t, prev_n = cur_t, cur_n
    error = np.where(np.isfinite(error), error, np.inf)
    return Estimate(best, error)
