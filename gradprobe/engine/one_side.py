"""One side of a coordinate, for float32 code judged on its own arithmetic whose central
quotients at the wide steps rounding needs cross a kink on the other side.

A unit switched off just beside its kink (a ReLU whose argument sits 1e-3 below 0), or a
corner of a Huber loss within the wide steps, breaks the central quotients' error model at
every step wide enough to beat rounding, so :func:`.wide_steps.wide_estimate` and the
coordinate's own rounding (:mod:`.own_rounding`) leave it undecided, though the loss along the
other side may be smooth, often flat, out to the params' scale. There a one-sided quotient
Q(s) = (f(x + s) - f(x)) / s = f' + c1 s + c2 s**2 + ... (Taylor) reaches the derivative.

On each side, windows of three of the wide steps s1 < s2 < s3 (each about twice the last,
the widest within the params' scale): the estimate Q(s2), its truncation c1 s2 measured from
Q(s3) - Q(s2) (its rounding added) and taken WIDE_SAFETY times, plus WIDE_NOISE times Q(s2)'s
own rounding (2 noise / s2: two loss values). A window is used only where its quotients follow
that model, checked on the coordinate: Q(s2) - Q(s1) is at most SHRINK_LIMIT of Q(s3) - Q(s2)
and in the same direction beyond rounding (a first-order term halves as the step halves; a
kink on that side within the window makes the differences grow as the step shrinks), the
steps ascend within the params' scale, and every one-sided quotient on that side at a smaller
step (the wide rows below the window and the ladders' steps, down to rounding's floor) lies as
close to the estimate as the window's smallest does, within its own rounding and the bound (a
kink on that side nearer than the window would move the smaller steps' quotients).

Only passes come from one side: the analytic value within the threshold of a side's estimate
whose bound is at most REACH tolerances (the level at which a pass tells an error of ten
thresholds from none, as :mod:`.loose_passes` keeps). A failure needs the central model or the
kink logic (a kink nearer than every step makes one side's slope the other's). The pairs are
those the wide steps took: no new evaluations.

A corner just beyond the first wide step (:func:`narrow_passes`) breaks every wide window while
the steps below it see a smooth, often quadratic, piece whose central quotients rounding alone
moves: the wide steps' windows (:func:`.wide_steps.windowed`, :func:`.wide_steps.plain_windowed`,
their model checks unchanged) on a table extended NARROW_ROWS rows below, passes only, as above.
"""

from __future__ import annotations

import numpy as np

from ..common.status import INCONCLUSIVE, PASS
from .ladder import Estimate
from .loose_passes import REACH
from .probe import TensorProbe
from .refine import Taken, pairs_reusing
from .verdict import NOISE, Judged
from .wide_steps import (STEP_GROWTH, WIDE_FIRST, WIDE_LAST, WIDE_NOISE, WIDE_ROWS, WIDE_SAFETY,
                         agree, plain_windowed, shrinking, wide_table, windowed)

NARROW_ROWS = 3  # rows below the first wide step (h/8, h/16, h/32 of the first step h)


def one_sided_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
                     taken: list[Taken], reasons: tuple[str, ...] = (NOISE,)) -> Judged:
    """``judged`` with coordinates ``which`` (positions in ``flat``) that rounding left
    undecided (for one of ``reasons``) passed where one side's estimate agrees with the analytic
    value within the threshold at a bound of at most REACH tolerances (the tighter side's
    estimate taken)."""
    which = _undecided(judged, which, reasons)
    if which.size == 0:
        return judged
    return _passed(probe, flat, judged, which, list(side_estimates(probe, flat[which], taken)))


def narrow_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
                  taken: list[Taken], reasons: tuple[str, ...] = (NOISE,)) -> Judged:
    """``judged`` with coordinates ``which`` that rounding left undecided passed where the wide
    steps' windows, their table extended NARROW_ROWS rows below the first wide step, agree with
    the analytic value within the threshold at a bound of at most REACH tolerances: a corner
    (f'' jumps, a Huber loss's) just beyond the first wide step leaves the central quotients
    exact on a quadratic piece below it, and every wide window crosses the corner. 2 NARROW_ROWS
    calls per coordinate (the wide rows' pairs are reused)."""
    which = _undecided(judged, which, reasons)
    if which.size == 0:
        return judged
    where = flat[which]
    ks = np.arange(WIDE_FIRST - NARROW_ROWS, WIDE_LAST + WIDE_ROWS)
    steps = probe.prior_steps(where)[None, :] * 2.0 ** ks[:, None]
    p = pairs_reusing(probe, np.tile(where, ks.size), steps.reshape(-1), taken)
    table = wide_table(probe, p, ks.size, np.maximum(np.abs(probe.x[where].astype(np.float64)), probe.x_scale))
    return _passed(probe, flat, judged, which, [Estimate.better(windowed(*table), plain_windowed(*table))])


def _undecided(judged: Judged, which: np.ndarray, reasons: tuple[str, ...]) -> np.ndarray:
    return which[(judged.status[which] == INCONCLUSIVE)
                 & np.array([judged.reasons[k] in reasons for k in which], dtype=bool)]


def _passed(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
            estimates: list[Estimate]) -> Judged:
    """``judged`` with coordinates ``which`` passed where one of ``estimates`` (each for
    ``flat[which]``) agrees with the analytic value within the threshold at a bound of at most
    REACH tolerances (the tightest such estimate kept)."""
    where = flat[which]
    a = probe.a[where]
    passed = np.zeros(where.size, dtype=bool)
    value, error = np.full(where.size, np.nan), np.full(where.size, np.inf)
    for est in estimates:
        tol = probe.tolerance(where, est.value)
        with np.errstate(invalid="ignore"):
            ok = (np.abs(a - est.value) <= tol) & (est.error <= REACH * tol) & (est.error < error)
        passed |= ok
        value, error = np.where(ok, est.value, value), np.where(ok, est.error, error)
    if not passed.any():
        return judged
    k = np.flatnonzero(passed)
    mine = Judged(np.full(k.size, PASS, dtype=judged.status.dtype), Estimate(value[k], error[k]),
                  tuple(None for _ in k), np.zeros(k.size, dtype=bool))
    return judged.merged(which[k], mine)


def side_estimates(probe: TensorProbe, flat: np.ndarray, taken: list[Taken]) -> tuple[Estimate, Estimate]:
    """The right and the left side's estimates of the derivative at coordinates ``flat`` from
    the wide steps' pairs (those ``taken`` before; infinite bounds where no window follows the
    model)."""
    n = flat.size
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    rows = ks.size
    first = probe.prior_steps(flat)
    steps = first[None, :] * 2.0 ** ks[:, None]
    p = pairs_reusing(probe, np.tile(flat, rows), steps.reshape(-1), taken)
    right, left = (q.reshape(rows, n) for q in p.sides(probe.f0))
    h_plus, h_minus = p.h_plus.reshape(rows, n), p.h_minus.reshape(rows, n)
    noise = p.noise.reshape(rows, n)
    limit = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    below = first * 2.0**WIDE_FIRST
    small_r, small_l = smaller_quotients(probe, flat, below, taken)
    return tuple(Estimate.better(_side(q, s, 2.0 * noise / s, limit, small),  # type: ignore[return-value]
                                 _side_extrapolated(q, s, 2.0 * noise / s, limit, small))
                 for q, s, small in ((right, h_plus, small_r), (left, h_minus, small_l)))


def smaller_quotients(probe: TensorProbe, flat: np.ndarray, below: np.ndarray,
             taken: list[Taken]) -> tuple[list[list[tuple[float, float]]], list[list[tuple[float, float]]]]:
    """Per coordinate and side, the one-sided quotients (with their rounding) of the pairs
    ``taken`` at steps below ``below`` (the ladders' steps under the wide ones)."""
    pos = {int(c): i for i, c in enumerate(flat.tolist())}
    right: list[list[tuple[float, float]]] = [[] for _ in range(flat.size)]
    left: list[list[tuple[float, float]]] = [[] for _ in range(flat.size)]
    for where, asked, p in taken:
        q_r, q_l = p.sides(probe.f0)
        for k, (c, s) in enumerate(zip(where.tolist(), asked.tolist())):
            i = pos.get(int(c))
            if i is None or not s < below[i]:
                continue
            if np.isfinite(q_r[k]) and p.h_plus[k] > 0:
                right[i].append((float(q_r[k]), float(2.0 * p.noise[k] / p.h_plus[k])))
            if np.isfinite(q_l[k]) and p.h_minus[k] > 0:
                left[i].append((float(q_l[k]), float(2.0 * p.noise[k] / p.h_minus[k])))
    return right, left


def _side(q: np.ndarray, s: np.ndarray, e: np.ndarray, limit: np.ndarray,
          smaller: list[list[tuple[float, float]]]) -> Estimate:
    """One side's estimate from its quotients ``q`` at steps ``s`` (rows ascending, a column
    per coordinate) with their rounding ``e``, windows whose steps stay within ``limit``, and
    the quotients at ``smaller`` steps each estimate must continue."""
    rows, n = q.shape
    value = q[0].copy()
    error = np.full(n, np.inf)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for w in range(rows - 2):
            i1, i2, i3 = w, w + 1, w + 2
            lower, upper = q[i2] - q[i1], q[i3] - q[i2]
            follows = np.isfinite(q[i1]) & np.isfinite(q[i2]) & np.isfinite(q[i3])
            follows &= shrinking([lower, upper], [e[i1] + e[i2], e[i2] + e[i3]])
            follows &= (s[i2] >= STEP_GROWTH * s[i1]) & (s[i3] >= STEP_GROWTH * s[i2]) & (s[i3] <= limit)
            trunc = (np.abs(upper) + e[i2] + e[i3]) * s[i2] / (s[i3] - s[i2])
            bound = WIDE_SAFETY * trunc + WIDE_NOISE * e[i2]
            follows &= _continued(q, s, e, w, q[i2], bound, smaller, follows)
            bound = np.where(follows & np.isfinite(bound), bound, np.inf)
            take = bound < error
            value = np.where(take, q[i2], value)
            error = np.where(take, bound, error)
    return Estimate(value, error)


def _continued(q: np.ndarray, s: np.ndarray, e: np.ndarray, w: int, estimate: np.ndarray, bound: np.ndarray,
               smaller: list[list[tuple[float, float]]], follows: np.ndarray) -> np.ndarray:
    """Per coordinate, of those ``follows`` holds for: every quotient on the side at a step
    below the window starting at row ``w`` (the wide rows below it, with smaller steps, and
    the ``smaller`` ones the ladders took) lies as close to ``estimate`` as the window's
    smallest does, within its own rounding and ``bound`` (a kink on that side nearer than the
    window would move it)."""
    near = np.abs(q[w] - estimate)
    ok = follows.copy()
    for j in range(w):
        ok &= (s[j] < s[w]) & (np.abs(q[j] - estimate) <= near + WIDE_NOISE * e[j] + bound)
    for c in np.flatnonzero(ok):
        for qj, ej in smaller[c]:
            if not abs(qj - estimate[c]) <= near[c] + WIDE_NOISE * ej + bound[c]:
                ok[c] = False
                break
    return ok


def _side_extrapolated(q: np.ndarray, s: np.ndarray, e: np.ndarray, limit: np.ndarray,
                       smaller: list[list[tuple[float, float]]]) -> Estimate:
    """One side's estimate from its quotients ``q`` at steps ``s`` (as :func:`_side` takes
    them), extrapolated: where the side's first-order term is seen above rounding, taking
    Q(s) itself leaves c1 s in the bound, far above what the side resolves (a quadratic piece
    beside a Huber corner on the other side: Q is f' + c1 s out to the params' scale).

    Windows of four steps s1 < s2 < s3 < s4 (each about twice the last, within ``limit``).
    Q = f' + c1 s + c2 s**2 + ...: the differences of consecutive quotients follow a
    first-order term, seen beyond rounding at the window's widest, each between a quarter and
    SHRINK_LIMIT of the next larger one (they halve as the step halves) and in the same
    direction. Richardson's R12 = (s2 Q1 - s1 Q2) / (s2 - s1) = f' - c2 s1 s2 + ...; c2 is
    measured twice, from R12 - R23 and from R23 - R34, each with its rounding added, and the two
    must agree (to a factor of two, :func:`.wide_steps.agree`); the larger is taken WIDE_SAFETY
    times, plus WIDE_NOISE times R12's own rounding. Every smaller step's quotient on that side
    lies as close to the estimate as the window's smallest does, within its rounding and the
    bound (a kink nearer than the window would move it)."""
    rows, n = q.shape
    value = q[0].copy()
    error = np.full(n, np.inf)

    def richardson(i: int) -> tuple[np.ndarray, np.ndarray]:
        a, b = s[i], s[i + 1]
        return (b * q[i] - a * q[i + 1]) / (b - a), (b * e[i] + a * e[i + 1]) / (b - a)

    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for w in range(rows - 3):
            i = list(range(w, w + 4))
            signed = [q[i[k + 1]] - q[i[k]] for k in range(3)]
            noise = [e[i[k]] + e[i[k + 1]] for k in range(3)]
            follows = np.all(np.isfinite(q[w:w + 4]), axis=0)
            follows &= shrinking(signed, noise)
            for k in range(2):  # nor faster than fourfold (a first-order term halves)
                room = 2.0 * WIDE_NOISE * (noise[k] + noise[k + 1])
                follows &= np.abs(signed[k]) >= np.abs(signed[k + 1]) / 4.0 - room
            follows &= np.abs(signed[2]) > 2.0 * WIDE_NOISE * noise[2]  # the term is seen
            for a, b in zip(i[:-1], i[1:]):
                follows &= s[b] >= STEP_GROWTH * s[a]
            follows &= s[i[-1]] <= limit
            (r12, n12), (r23, n23), (r34, n34) = richardson(i[0]), richardson(i[1]), richardson(i[2])
            s1, s2, s3, s4 = (s[k] for k in i)
            wa, wb = s2 * (s3 - s1), s3 * (s4 - s2)
            c2a, c2b = (r12 - r23) / wa, (r23 - r34) / wb
            slack_a, slack_b = (n12 + n23) / wa, (n23 + n34) / wb
            follows &= agree(c2a, slack_a, c2b, slack_b)
            c2 = np.maximum(np.abs(c2a) + slack_a, np.abs(c2b) + slack_b)
            bound = WIDE_SAFETY * c2 * s1 * s2 + WIDE_NOISE * n12
            follows &= _continued(q, s, e, w, r12, bound, smaller, follows)
            bound = np.where(follows & np.isfinite(bound), bound, np.inf)
            take = bound < error
            value = np.where(take, r12, value)
            error = np.where(take, bound, error)
    return Estimate(value, error)


__all__ = ["narrow_passes", "one_sided_passes", "side_estimates", "smaller_quotients"]
