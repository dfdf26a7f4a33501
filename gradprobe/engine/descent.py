"""Ladders further down, for coordinates whose quotients were still moving away at the
smallest step tried.

A pole or kink closer to the point than every step of the two ladders (1/(c - x) with its
pole 3e-10 away, finite on both sides) leaves the central quotients changing faster and
faster as the step shrinks: the steps are not yet in the range where the tableau's error
model holds, and nothing was decided. Where the loss's rounding still leaves room (the
coordinate was not left undecided for noise), a ladder continues below the smallest step,
DESCENTS times at most and never below RESOLUTION_UNITS spacings of x, until the coordinate
is decided (a loss smooth once the steps are inside the pole's distance; the ladder that
crosses the pole's distance has its upper rows beyond it, and the next one settles) or the
rounding stops it.
"""

from __future__ import annotations

import numpy as np

from .grounds import judged_ladder
from .ladder import NOISE_UNITS
from .probe import TensorProbe
from .refine import RATIO, ROWS, Ladder, Taken, climb, ladder_taken
from .verdict import SHARED_POINT, UNRESOLVED, UNSETTLED, Judged
from ..common.status import INCONCLUSIVE, PASS

DESCENTS = 3  # further ladders at most, each starting just below the last one's smallest step
RESOLUTION_UNITS = 64.0
GROWTH = 3.0  # quotients' changes growing this much per halving of the step: a pole within  # a ladder's smallest step stays above this many spacings of x


def still_growing(ladder: Ladder) -> np.ndarray:
    """Per coordinate: the central quotients' last three changes keep one sign and each is at
    least GROWTH times the one before, beyond the rounding noise: quotients running away as the
    step shrinks, as across a pole closer than the steps (a central quotient there goes like
    1/h**2, its changes growing fourfold per halving and faster). Kinks closer than the steps
    move the quotients like 1/h at most (changes doubling), within the sides' slopes.
    Also where three such changes came earlier in the ladder and its last change is still
    beyond the noise (:func:`turned`): the steps reached the pole's distance among its rows."""
    assert ladder.pairs is not None
    n = ladder.smallest.size
    p = ladder.pairs
    rows = p.f_plus.size // n
    if rows < 4:
        return np.zeros(n, dtype=bool)
    q = p.central.reshape(rows, n)
    noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, n)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        runs = [_run_away(q[k - 3:k + 1]) for k in range(3, rows)]  # the changes ending at row k
        room = 2.0 * NOISE_UNITS * (noise[-1] + noise[-2])
        last = np.abs(q[-1] - q[-2]) > room
        return (runs[-1] & last) | turned(q, runs, last) | crossed_at_last(q, runs, last)


def _run_away(q: np.ndarray) -> np.ndarray:
    """Four rows of central quotients whose three changes keep one sign, each at least GROWTH
    times the one before."""
    c1, c2, c3 = q[1] - q[0], q[2] - q[1], q[3] - q[2]
    same = ((c1 > 0) & (c2 > 0) & (c3 > 0)) | ((c1 < 0) & (c2 < 0) & (c3 < 0))
    return same & (np.abs(c2) >= GROWTH * np.abs(c1)) & (np.abs(c3) >= GROWTH * np.abs(c2))


def turned(q: np.ndarray, runs: list[np.ndarray], last: np.ndarray) -> np.ndarray:
    """Quotients that ran away (:func:`_run_away`) among the upper rows, then turned: the
    largest change came after the run, and the last change is smaller than it yet beyond the
    noise (``last``). A pole at a distance between the ladder's steps: the rows below its
    distance approach the derivative as a smooth loss's do, from a quotient the rows above
    left far off, and a ladder below the smallest step settles it (a kink's quotients never
    run away like that)."""
    if len(runs) < 2:
        return np.zeros(q.shape[1], dtype=bool)
    before = np.any(np.array(runs[:-1]), axis=0)
    changes = np.abs(np.diff(q, axis=0))
    peak = np.argmax(changes, axis=0)
    return before & last & (peak >= 3) & (peak < changes.shape[0] - 1)


def crossed_at_last(q: np.ndarray, runs: list[np.ndarray], last: np.ndarray) -> np.ndarray:
    """Quotients that ran away (:func:`_run_away`) up to the row before the last, whose last
    change turned sign, beyond the noise (``last``), and is larger still than the one before:
    the smallest step crossed the pole (a quotient across it takes the other sign, larger
    yet), which lies between the last two steps; a ladder below them is inside its distance
    (steep-73014: 1/(1 - u) with its pole 1.4e-9 away, the central quotients growing 4-fold
    per halving to 3.8e15 at 1.9e-9, then -5.3e15 at 9.3e-10). Quotients scattering at a
    kink after an early run change less than that."""
    if len(runs) < 2:
        return np.zeros(q.shape[1], dtype=bool)
    c_last, c_before = q[-1] - q[-2], q[-2] - q[-3]
    turn = (c_last * c_before < 0) & (np.abs(c_last) >= np.abs(c_before))
    return runs[-2] & last & turn


def runaway_passes(judged: Judged, ladder: Ladder) -> Judged:
    """``judged`` (the verdicts of ``ladder``) with its passes on estimates with no bound
    undecided (UNSETTLED, not noise-limited) where the central quotients run away as the step
    shrinks (:func:`still_growing`): a pole closer than the steps, the quotients telling
    nothing of the slope at the point (1/(1 - u) 1.4e-9 away read 4e8 +- inf against a true
    3e15 and passed a gradient left out, steep-73014); the ladders below decide them."""
    if ladder.pairs is None:
        return judged
    k = np.flatnonzero((judged.status == PASS) & ~np.isfinite(judged.estimate.error) & still_growing(ladder))
    return judged.undecided(k, (UNSETTLED,) * k.size, noise_limited=False)


def descend(probe: TensorProbe, flat: np.ndarray, judged: Judged, ladder: Ladder, taken: list[Taken]) -> Judged:
    """``judged`` (the verdicts of ``ladder``, the last one taken at ``flat``) with the
    coordinates left undecided, not for noise, whose quotients were still growing, judged on
    ladders further down (see the module's note); the pairs are added to ``taken``."""
    which = np.arange(flat.size)
    growing = still_growing(ladder)  # the first time; below, the quotients may settle late
    for _ in range(DESCENTS):
        smallest = ladder.smallest
        pick = ((judged.status[which] == INCONCLUSIVE) & ~judged.noise_limited[which] & growing
                & (smallest / RATIO ** (ROWS + 2) > RESOLUTION_UNITS * probe.resolution(flat[which])))
        which, smallest = which[pick], smallest[pick]
        growing = np.ones(which.size, dtype=bool)
        if which.size == 0:
            break
        start = smallest / RATIO
        ladder = climb(probe, flat[which], start, ROWS + 2, taken=taken)
        start = start if ladder.start is None else ladder.start
        judged = judged.merged(which, judged_ladder(probe, flat[which], ladder, start, taken))
        taken.append(ladder_taken(flat[which], start, ladder))
    return judged


BETWEEN_RISE = 3  # the ladder between starts 2**3 times above the first ladder's start


def between_levels(probe: TensorProbe, flat: np.ndarray, judged: Judged, start: np.ndarray,
                   taken: list[Taken]) -> Judged:
    """``judged`` with coordinates left undecided for noise, whose estimate lies off the
    analytic value beyond the threshold, judged on one more ladder, from BETWEEN_RISE
    halvings above the first ladder's ``start``, where that decides them. The first ladder
    starts a 16-fold level below a step where the slope bends, and the retry for noise goes
    up only in 16-fold levels that stay smooth: a slope that bends 10% at the first step
    leaves the steps between unexplored, where truncation is still small and the rounding
    noise 8 times smaller, enough to settle a discrepancy far beyond the threshold (a
    factor of 2) that the threshold itself is out of reach for. Not for 16-bit arithmetic,
    whose loss is a staircase on which a tableau's agreement can be chance."""
    if probe.compute_dtype.itemsize <= 2:  # 16-bit arithmetic: a staircase, judged apart (sixteen.py)
        return judged
    value = judged.estimate.value
    a = probe.a[flat]
    # Not where a tiny step showed a kink at the point (its jump kept): a ladder at these
    # steps would take the side that crossed no other kink for the derivative there.
    at_a_kink = np.array([r in (UNRESOLVED, SHARED_POINT) for r in judged.reasons], dtype=bool)
    which = np.flatnonzero((judged.status == INCONCLUSIVE) & judged.noise_limited & np.isfinite(value)
                           & (np.abs(a - value) > probe.tolerance(flat, value)) & ~at_a_kink)
    if which.size == 0:
        return judged
    top = start[which] * RATIO**BETWEEN_RISE
    ladder = climb(probe, flat[which], top, ROWS, taken=taken)
    top = top if ladder.start is None else ladder.start
    again = runaway_passes(judged_ladder(probe, flat[which], ladder, top, taken), ladder)
    taken.append(ladder_taken(flat[which], top, ladder))
    decided = np.flatnonzero(again.status != INCONCLUSIVE)
    return judged.merged(which[decided], again.pick(decided))
