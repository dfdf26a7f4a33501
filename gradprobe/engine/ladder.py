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

import numpy as np

from ..common.classes import dataclass

SAFETY = 2.0  # the neighbours' spread is multiplied by this
NOISE_UNITS = 2.0  # and the propagated rounding noise by this
RATE_SLACK = 1.8  # a column's change per row may be up to 1.8 times what its model says (central
# quotients: 0.45 of the change before, below the 0.5 of an error linear in the step, which a
# corner of the second derivative at the point gives), or turn back by 1/1.8 of it
PREDICTION_SLACK = 1.5  # a next quotient's distance may shrink 1.5 times less than the model says
DRIFT_SLACK = 1.5  # changes growing by the step ratio, give or take this factor, drift like 1/h


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


def at_model_rate(change: np.ndarray, before: np.ndarray, expected: float, noise: np.ndarray) -> np.ndarray:
    """A column of the tableau changes from one row to the next the way its error model says.

    Where the model holds, an entry's error is a constant times a power of the step, so the
    change ``change`` between two rows is the previous change ``before`` times ``expected``
    (1/4 for central quotients halving their step, 1/16 for the next column, ...). A change
    that shrinks less than RATE_SLACK times that (or grows, or turns back by more than
    expected / RATE_SLACK of the previous one) shows steps beyond the range where the model
    holds: beyond the scale on which the loss bends, across a kink, or a column not yet in
    its range; entries built there can agree by chance. A change that shrinks faster (the
    next order dominating, or the loss linear between kinks) is allowed: the extrapolation's
    own step is then part of its bound. A change within the rounding noise ``noise`` (of the
    entries involved) says nothing against the model.
    """
    noisy = np.abs(change) <= 2.0 * NOISE_UNITS * noise
    high = min(expected * RATE_SLACK, 0.5 * (1.0 + expected))
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = change / before
    return noisy | ((rate >= -expected / RATE_SLACK) & (rate <= high))


def column_rates(entries: np.ndarray, noise: np.ndarray, expected: float, ratio: float | None = None) -> np.ndarray:
    """Per row of one column of the tableau (rows, coordinates): its change at that row is at
    the model's rate (:func:`at_model_rate`); False for the first two rows (no rate yet).
    With the steps' ``ratio``, also False where the column drifts like 1/h
    (:func:`drifting`), within the rounding noise or not."""
    ok = np.zeros(entries.shape, dtype=bool)
    for k in range(2, entries.shape[0]):
        ok[k] = at_model_rate(entries[k] - entries[k - 1], entries[k - 1] - entries[k - 2], expected,
                              noise[k] + noise[k - 1] + noise[k - 2])
    if ratio is not None:
        ok &= ~drifting(entries, noise, ratio)
    return ok


def drifting(entries: np.ndarray, noise: np.ndarray, ratio: float) -> np.ndarray:
    """Per row (rows, coordinates): the last three changes down to this row keep one sign,
    each is the step ratio times the one before (within DRIFT_SLACK), and the last is beyond
    half the entry's rounding noise: the entries move like c/h as the step shrinks, with c
    larger than the loss's rounding can make (two loss values rounded apart by a fixed
    amount, each within the noise, move a quotient by at most half its noise from one row
    to the next, a step half the size). That is what a kink closer to the point than
    the steps gives (a quotient across it changes by jump * distance / h), never a smooth
    loss's error model (its changes shrink); the rows there tell nothing of the derivative at
    the point, even where the changes lie within the noise allowance of
    :func:`at_model_rate` (rounding of one loss value against another, fixed as the step
    shrinks, drifts the same way, but its c stays within that rounding)."""
    out = np.zeros(entries.shape, dtype=bool)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        change = np.diff(entries, axis=0)  # change[k - 1] is the change at row k
        for k in range(3, entries.shape[0]):
            c1, c2, c3 = change[k - 3], change[k - 2], change[k - 1]
            same = ((c1 > 0) & (c2 > 0) & (c3 > 0)) | ((c1 < 0) & (c2 < 0) & (c3 < 0))
            r2, r3 = c2 / c1, c3 / c2
            grow = ((r2 >= ratio / DRIFT_SLACK) & (r2 <= ratio * DRIFT_SLACK)
                    & (r3 >= ratio / DRIFT_SLACK) & (r3 <= ratio * DRIFT_SLACK))
            out[k] = same & grow & (np.abs(c3) > 0.5 * noise[k])
    return out


def column_steady(entries: np.ndarray, noise: np.ndarray, expected: float, ratio: float | None = None) -> np.ndarray:
    """Per row of one column of the tableau (rows, coordinates): the column has changed at
    its model's rate (:func:`column_rates`) at this row and, where it has an earlier change
    to compare, at the row before too; one rate alone can fit by chance where the quotients
    scatter (rounding above its model, kinks among the steps). The second row has no rate:
    it is steady only where its change is within the noise."""
    ok = column_rates(entries, noise, expected, ratio)
    steady = ok.copy()
    steady[3:] &= ok[2:-1]
    if entries.shape[0] > 1:
        steady[1] = np.abs(entries[1] - entries[0]) <= 2.0 * NOISE_UNITS * (noise[1] + noise[0])
    return steady


def _checked_by_next_row(
    quotient: np.ndarray, before: np.ndarray, noise: np.ndarray, best: np.ndarray,
    error: np.ndarray, shrink: float, at_rate: np.ndarray,
) -> np.ndarray:
    """``error`` (the bound of the estimate ``best`` taken from the rows above), widened where
    the next row's quotient contradicts it.

    Where the tableau's error model holds, a quotient's distance from the derivative shrinks
    by ``shrink`` per row: the estimate predicts that ``quotient`` lies within
    PREDICTION_SLACK * shrink of the previous quotient's distance from it, plus its own bound
    and the noise. A quotient further out shows that the rows above were not yet in the range
    where the model holds (their agreement was a coincidence of orders), and the bound is
    widened to cover it. A quotient whose change is not at the model's rate at all
    (``at_rate`` False: growing as the step shrinks, as when the steps cross a kink near the
    point) leaves the estimate with no bound: the model it was extrapolated by does not
    hold on these steps."""
    predicted = PREDICTION_SLACK * shrink * np.abs(before - best) + error + NOISE_UNITS * noise
    contradicted = np.abs(quotient - best) > predicted
    error = np.where(contradicted, SAFETY * np.abs(quotient - best) + error, error)
    return np.where(at_rate, error, np.inf)


def _column_checked(entry: np.ndarray, before: np.ndarray, noise: np.ndarray, best: np.ndarray,
                    error: np.ndarray, shrink: float) -> np.ndarray:
    """``error`` widened where an extrapolated column's entry at the next row contradicts the
    estimate ``best``: where the column's model holds its distance from the derivative shrinks
    by ``shrink`` per row, as the quotients' does (:func:`_checked_by_next_row`). An entry
    further out shows the rows the estimate was built from agreed by chance (a turn of the
    column among steps near the loss's bend: steep-490011, softplus of sharpness 100 x 525,
    whose first extrapolations agreed to 3.6e-4 at steps of 1.5e-5 and 7.6e-6 and turned by
    2.2e-3 at the next row, the estimate 2.4e-3 off with a bound of 7.7e-4)."""
    predicted = PREDICTION_SLACK * shrink * np.abs(before - best) + error + NOISE_UNITS * noise
    contradicted = np.abs(entry - best) > predicted
    return np.where(contradicted, SAFETY * np.abs(entry - best) + error, error)


RECEDING_ROWS = 2  # quotients moving away from the estimate this many rows running
AWAY_ROWS = 3  # ... or this many, each move in the same direction, whatever their sizes


def _receding(
    quotient: np.ndarray, before: np.ndarray, earlier: np.ndarray | None, best: np.ndarray,
    error: np.ndarray, runs: tuple[np.ndarray, np.ndarray], away_rows: int | None = AWAY_ROWS,
) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]:
    """``error`` widened where the quotients have moved away from the estimate ``best`` row
    after row, each move in the same direction as the one before, and now lie beyond its
    bound: RECEDING_ROWS times running (this row's included) with each move no larger than
    the one before (they converge, to another value), or ``away_rows`` times running
    whatever the moves' sizes (None: not counted). A sound estimate has the quotients close
    in on it as the step shrinks; rounding moves them at random, by more the smaller the
    step, and seldom one way three rows running. Quotients heading steadily elsewhere, even by less than the rounding noise
    allows (which :func:`_checked_by_next_row` leaves alone), show that the rows the estimate
    was taken from were not yet where its model holds (a corner or kink between their steps
    and the point; kinks-500818: Huber corners at 1e-7 to 1e-6 beside the point, the
    quotients moving 6.7e-10, 8.9e-10, 1.2e-9, 1.7e-9 away from an estimate of bound 2.6e-9
    that their turn had settled, toward the true value 1e-8 off it). Returns the widened
    bound and the updated run counts."""
    receding, away = runs
    change = quotient - before
    same = np.zeros(change.shape, dtype=bool) if earlier is None else change * (before - earlier) > 0
    steady = same & (np.abs(change) <= np.abs(before - earlier)) if earlier is not None else same
    farther = np.abs(quotient - best) > np.abs(before - best)
    receding = np.where(farther & steady, receding + 1, 0)  # (called within the tableau's errstate)
    away = np.where(farther & same, away + 1, 0)
    far = (away >= away_rows) if away_rows is not None else np.zeros(away.shape, dtype=bool)
    beyond = ((receding >= RECEDING_ROWS) | far) & (np.abs(quotient - best) > error)
    return np.where(beyond, SAFETY * np.abs(quotient - best) + error, error), (receding, away)


def _build(quotients: np.ndarray, noise: np.ndarray, ratio: float, order_step: int
           ) -> tuple[list[list[np.ndarray]], list[list[np.ndarray]]]:
    """The tableau's entries T[k][j] (j <= k) and the rounding noise each carries."""
    entries: list[list[np.ndarray]] = []
    carried: list[list[np.ndarray]] = []
    with np.errstate(invalid="ignore", over="ignore"):
        for k in range(quotients.shape[0]):
            row, row_n = [quotients[k]], [noise[k]]
            for j in range(1, k + 1):
                factor = ratio ** (order_step * j)
                up, up_n = entries[k - 1][j - 1], carried[k - 1][j - 1]
                row.append(row[j - 1] + (row[j - 1] - up) / (factor - 1.0))
                row_n.append(row_n[j - 1] * factor / (factor - 1.0) + up_n / (factor - 1.0))
            entries.append(row)
            carried.append(row_n)
    return entries, carried


def _steadiness(entries: list[list[np.ndarray]], carried: list[list[np.ndarray]], base: float,
                ratio: float) -> list[np.ndarray]:
    """Per column j and row k: column j and every column below it are steady at row k
    (:func:`column_steady`): an extrapolation is only as sound as the columns it was built
    from (a first rate can fit by chance in a column built on scattered quotients)."""
    rows = len(entries)
    out = []
    below = None
    for j in range(rows):
        column = np.array([entries[k][j] for k in range(j, rows)])
        noise = np.array([carried[k][j] for k in range(j, rows)])
        steady = np.zeros((rows,) + column.shape[1:], dtype=bool)
        steady[j:] = column_steady(column, noise, base ** -(j + 1), ratio)
        if below is not None:
            steady &= below
        out.append(steady)
        below = steady
    return out


def tableau(quotients: np.ndarray, noise: np.ndarray, ratio: float, order_step: int) -> Estimate:
    """Richardson's tableau over rows of ``quotients`` (steps shrinking by ``ratio`` per row).

    ``order_step`` is 2 for central quotients (even powers of h) and 1 for one-sided ones.
    ``noise`` holds each quotient's rounding noise. Both are shaped (rows, coordinates).
    An entry is a candidate only where the column it is extrapolated from was seen to change
    at its model's rate on that coordinate (:func:`column_steady`; for the diagonal, whose
    column has one change only, the column below it), and each further row's quotient must
    fall where the estimate taken so far predicts, or its bound widens
    (:func:`_checked_by_next_row`). In the central tableau each extrapolated column's next
    entry must too (:func:`_column_checked`), and quotients heading away from the estimate
    three rows running widen it (:func:`_receding`).
    """
    rows, n = quotients.shape
    base = ratio**order_step
    entries, carried = _build(quotients, noise, ratio, order_step)
    steady = _steadiness(entries, carried, base, ratio)
    at_rate = column_rates(quotients, noise, 1.0 / base, ratio)
    at_rate[:2] = True  # no rate to compare yet
    best = quotients[0].copy()
    error = np.full(n, np.inf)
    runs = (np.zeros(n, dtype=int), np.zeros(n, dtype=int))  # rows in a row whose quotient lay farther from best
    # The central tableau's own checks on the rows after an estimate; a side's quotients
    # (first order) keep the checks they had (a side crossing corners is the kink logic's).
    central = order_step == 2
    away_rows = AWAY_ROWS if central else None
    with np.errstate(invalid="ignore", over="ignore"):
        for k in range(1, rows):
            error = _checked_by_next_row(quotients[k], quotients[k - 1], noise[k] + noise[k - 1],
                                         best, error, 1.0 / base, at_rate[k])
            error, runs = _receding(quotients[k], quotients[k - 1], quotients[k - 2] if k >= 2 else None,
                                    best, error, runs, away_rows)
            for j in range(1, k if central else 1):  # each extrapolated column's next entry
                error = _column_checked(entries[k][j], entries[k - 1][j], carried[k][j] + carried[k - 1][j],
                                        best, error, base ** -(j + 1))
            for j in range(k + 1):
                value = entries[k][j]
                if j == 0:
                    neighbours = [entries[k - 1][0]] + ([entries[k - 2][0]] if k >= 2 else [])
                    allowed = steady[0][k]
                else:
                    # the two it is extrapolated from, and the same order one step larger
                    neighbours = [entries[k][j - 1], entries[k - 1][j - 1]]
                    if j < k:
                        neighbours.append(entries[k - 1][j])
                        allowed = steady[j - 1][k]
                    else:
                        allowed = steady[j - 2][k] if j >= 2 else np.zeros(n, dtype=bool)
                spread = np.max([np.abs(value - other) for other in neighbours], axis=0)
                bound = SAFETY * spread + NOISE_UNITS * carried[k][j]
                take = (bound < error) & allowed
                best = np.where(take, value, best)
                error = np.where(take, bound, error)
                runs = (np.where(take, 0, runs[0]), np.where(take, 0, runs[1]))
    error = np.where(np.isfinite(error), error, np.inf)
    return Estimate(best, error)
