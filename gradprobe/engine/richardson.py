"""The steps of ``--method richardson`` and where its rows settle a coordinate (pure but for
the evaluations the probe makes).

The method extrapolates central quotients at steps h, h/2, h/4 (:mod:`.ladder`). Its
accuracy is set by h: too large and the tableau's sixth-order truncation shows, too small
and rounding noise divided by the step does. :func:`first_steps` measures, once per tensor,
on a few of its coordinates, the largest h at which the three rows' result no longer changes
beyond a quarter of its rounding noise when the step halves, and starts one halving below
it. :func:`two_rows_settle` lets a coordinate stop after two rows where the second row is
what the first predicts (the loss is quadratic along it) and the one-sided quotients agree
the way a smooth loss's do.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from ..common.roundoff import is_narrow
from .ladder import NOISE_UNITS, Estimate, _build
from .probe import Pairs, TensorProbe
from .refine import RATIO, Ladder
from .steps import SETTLE_FRACTION
from .verdict import Judged
from ..common.status import PASS

DEFAULT_START = 2.0**-7  # relative first step where nothing was measured (3 rows, 6 calls)
PILOT_MIN = 32  # a tensor swept whole with at least this many coordinates is measured
PILOTS = 2  # coordinates measured per tensor, evenly spread over it
PILOT_TOP = 2.0**-3  # relative steps 2**-3 ... 2**-9 (7 rows, 14 calls a coordinate; three
# of them are the coordinate's own first rows)
PILOT_ROWS = 7
CHANGE_SHARE = 0.25  # the result may change by a quarter of its noise when the step halves
GAP_SLACK = 0.1  # the sides' gap may halve to within 10% where two rows settle


def relative_scale(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    return np.maximum(1.0, np.abs(probe.x[flat].astype(np.float64)))


@dataclass(frozen=True)
class FirstSteps:
    """The first step per coordinate; the positions measured for the tensor and the pairs of
    their ladder's first three rows from that step (row-major; not evaluated again)."""

    h: np.ndarray
    measured: np.ndarray
    rows: Pairs | None = None


def first_steps(probe: TensorProbe, flat: np.ndarray) -> FirstSteps:
    """The first step per coordinate: ``factor * max(1, |x|)``, the factor measured once for
    the tensor (:func:`measured_factor`) where it is swept whole in float64 arithmetic with at
    least PILOT_MIN coordinates, else DEFAULT_START. Only then: a coordinate's steps must not
    depend on which others a sample checks with it."""
    scale = relative_scale(probe, flat)
    if flat.size < PILOT_MIN or flat.size != probe.size or is_narrow(probe.compute_dtype):
        return FirstSteps(DEFAULT_START * scale, np.zeros(0, dtype=np.int64))
    measured = ((np.arange(PILOTS) + 0.5) * flat.size / PILOTS).astype(np.int64)
    factor, pairs = measured_factor(probe, flat[measured])
    if pairs is None:
        return FirstSteps(factor * scale, np.zeros(0, dtype=np.int64))
    first = int(round(np.log2(PILOT_TOP / factor)))
    n = measured.size
    rows = Pairs(*(f[first * n:(first + 3) * n] for f in pairs.fields()))
    return FirstSteps(factor * scale, measured, rows)


def measured_factor(probe: TensorProbe, picks: np.ndarray) -> tuple[float, Pairs | None]:
    """The relative first step for a tensor, from a ladder of PILOT_ROWS rows on ``picks``
    (and that ladder's pairs, row-major; None where a step had to shrink).

    For each window of three rows k, k+1, k+2 the tableau's sixth-order entry is taken; the
    window is sound where that entry moves by at most CHANGE_SHARE of its carried rounding
    noise when the window moves one row down (its truncation is then below the noise: the
    step is as large as the loss allows). Per coordinate the largest sound step; for the
    tensor the smallest of those, one halving lower (the other coordinates may bend a little
    faster than the ones measured). DEFAULT_START (one of the ladder's steps) where a
    coordinate has no sound window or a step had to shrink (a domain edge, a non-finite loss)."""
    n = picks.size
    rows = PILOT_ROWS
    scale = relative_scale(probe, picks)
    steps = np.concatenate([PILOT_TOP * scale / RATIO**k for k in range(rows)])
    p = probe.pairs(np.tile(picks, rows), steps)
    if np.any(p.h_plus < 0.5 * steps) or np.any(p.h_minus < 0.5 * steps):
        return DEFAULT_START, None
    with np.errstate(over="ignore", invalid="ignore"):
        q = p.central.reshape(rows, n)
        noise = (2 * p.noise / (p.h_plus + p.h_minus)).reshape(rows, n)
    values, carried = [], []
    for k in range(rows - 2):
        entries, entry_noise = _build(q[k:k + 3], noise[k:k + 3], RATIO, 2)
        values.append(entries[2][2])
        carried.append(entry_noise[2][2])
    value, carry = np.array(values), np.array(carried)
    with np.errstate(over="ignore", invalid="ignore"):
        sound = np.abs(value[:-1] - value[1:]) <= CHANGE_SHARE * carry[:-1]
    if not np.all(sound.any(axis=0)):
        return DEFAULT_START, p
    first = int(np.argmax(sound, axis=0).max())
    return float(PILOT_TOP / RATIO ** (first + 1)), p


def two_rows_settle(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, tol: np.ndarray) -> np.ndarray:
    """Where a ladder of two rows settles a coordinate on its own: the second row's central
    quotient is the first's within rounding noise (the tableau's prediction when the loss is
    quadratic along the coordinate; its bound is then finite, :func:`.ladder.tableau`), the
    gap between the one-sided quotients halves with the step as a smooth loss's does (no kink
    among the steps), the bound is within the threshold, and the analytic value agrees with
    the estimate to SETTLE_FRACTION of the threshold (``tol``, absolute)."""
    assert ladder.pairs is not None
    n = flat.size
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # a steep loss's quotients
        right, left = ladder.pairs.sides(probe.f0)
        gap = (right - left).reshape(2, n)
        h = ladder.pairs.h_plus.reshape(2, n)
        side_noise = (4 * ladder.pairs.noise / np.minimum(ladder.pairs.h_plus, ladder.pairs.h_minus)).reshape(2, n)
        halves = np.abs(2 * gap[1] - gap[0]) <= GAP_SLACK * np.abs(gap[0]) + NOISE_UNITS * (2 * side_noise[1] + side_noise[0])
        halves &= np.all(h > 0, axis=0)
        est = ladder.central
        close = np.abs(probe.a[flat] - est.value) <= SETTLE_FRACTION * tol
    return np.isfinite(est.error) & (est.error <= tol) & halves & close


def settled(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> np.ndarray:
    """Where a ladder's verdict needs nothing more: its bound is far inside the threshold
    (SETTLE_FRACTION of it), or the coordinate passes with a bound within the threshold and
    the analytic value agrees with the estimate to SETTLE_FRACTION of it (as the central
    path's first pair settles a coordinate)."""
    est = judged.estimate
    tol = probe.tolerance(flat, est.value)
    close = np.abs(probe.a[flat] - est.value) <= SETTLE_FRACTION * tol
    return (est.error <= SETTLE_FRACTION * tol) | ((judged.status == PASS) & close & (est.error <= tol))


def rows_of(p: Pairs, n: int, which: np.ndarray) -> Pairs:
    """The pairs of every row of a ladder over ``n`` coordinates (row-major) for the
    coordinates at positions ``which``."""
    rows = p.f_plus.size // n
    index = (np.arange(rows)[:, None] * n + which[None, :]).reshape(-1)
    return Pairs(*(f[index] for f in p.fields()))


def joined(*parts: tuple[np.ndarray, Judged]) -> Judged:
    """Verdicts given in parts (positions, verdicts there) that together cover 0 .. n-1."""
    order = np.argsort(np.concatenate([where for where, _ in parts]), kind="stable")
    judged = [j for _, j in parts]
    reasons = [r for j in judged for r in j.reasons]
    return Judged(np.concatenate([j.status for j in judged])[order],
                  Estimate(np.concatenate([j.estimate.value for j in judged])[order],
                           np.concatenate([j.estimate.error for j in judged])[order]),
                  tuple(reasons[k] for k in order.tolist()),
                  np.concatenate([j.noise_limited for j in judged])[order])
