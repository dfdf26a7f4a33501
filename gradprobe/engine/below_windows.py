"""Verdicts taken on wide steps, checked against the quotients at the smaller steps, and
failures there that a kink at the point explains.

The wide-step windows (:mod:`.wide_steps` and the judgements on a coordinate's own rounding
after them) check their error model on their own quotients only. Between the point and the
smallest step of a window the loss may change its character: an RMS norm over elements of
1e-4 curves on that scale and is flat beyond it, so windows at steps of 0.1 to 1 follow the
model of a smooth quotient while the derivative at the point is another (0.31 +- 0.67 against
a true -475, which the smallest steps showed: -474.8 at 7.6e-6).

So a wide-step verdict stands only where every quotient taken at a step below the windows
agrees with it: within twice its bound, plus how far the quotient at the smallest wide step
already lies from it (truncation shrinks as the step does where the model holds), plus
AGREE_UNITS times the quotient's own rounding. Where one does not, the coordinate keeps the
verdict it had, with the reason.

A kink at the point puts every central quotient at the mean of its sides, however wide the
steps, and narrow arithmetic's rounding can hide its one-sided gap from the windows' checks:
16-bit quantile code whose residuals round to exactly 0 failed a correct coordinate at its
left slope, -0.0208, against central quotients of 0.001 to 0.01. A narrow coordinate the wide
steps fail, or leave undecided, is judged `kink` instead where, at two of the wide steps at
least, its one-sided quotients lie apart beyond KINK_NOISE times their rounding, that gap does
not shrink with the step as curvature's would (at a step half as wide or less it keeps
KINK_STEADY of itself), and the analytic value is the same side's quotient at each, within
SIDE_UNITS of that side's rounding and within SIDE_SHARE of the gap. An undecided one matters
too: a bfloat16 ReLU element exactly at its corner, left undecided, kinked every direction
that moved it, and a direction failed the correct tensor (inside16-3500379: 0.92 +- 0.13).
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe
from .refine import Taken
from .verdict import Judged, as_kinks
from .wide_steps import WIDE_FIRST

AGREE_UNITS = 8.0  # a smaller step's quotient may stray from the verdict by this many of its rounding
KINK_NOISE = 8.0  # a one-sided gap counts beyond this many of its sides' rounding
KINK_STEADY = 0.8  # and where it keeps this share of itself at a step half as wide or less (curvature's halves)
SIDE_UNITS = 3.0  # the analytic value is a side's quotient within this many of its rounding
SIDE_SHARE = 0.25  # and within this share of the gap: nearer that side than the mean of both
BELOW = ("the quotients at steps below the wide steps disagree with what the wide steps show, "
         "beyond their rounding: the loss changes its character between those steps")


def contradicted(probe: TensorProbe, flat: np.ndarray, value: np.ndarray, error: np.ndarray,
                 taken: list[Taken]) -> np.ndarray:
    """Per coordinate ``flat``: some pair ``taken`` below its wide steps puts the derivative
    away from ``value`` +- ``error`` beyond the allowance above."""
    first_wide = probe.prior_steps(flat) * 2.0 ** WIDE_FIRST
    position = {int(k): j for j, k in enumerate(flat)}
    below: list[list[tuple[float, float]]] = [[] for _ in flat]  # (quotient, its rounding)
    nearest = np.full(flat.size, np.nan)  # the quotient at the smallest wide step
    nearest_step = np.full(flat.size, np.inf)
    for where, _, pairs in taken:
        steps = 0.5 * (pairs.h_plus + pairs.h_minus)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            quotient = pairs.central
            rounding = 2.0 * pairs.noise / (pairs.h_plus + pairs.h_minus)
        for i, k in enumerate(where.tolist()):
            j = position.get(int(k))
            if j is None or not np.isfinite(quotient[i]) or not np.isfinite(rounding[i]):
                continue
            if steps[i] < first_wide[j]:
                below[j].append((float(quotient[i]), float(rounding[i])))
            elif steps[i] < nearest_step[j]:
                nearest_step[j], nearest[j] = steps[i], quotient[i]
    out = np.zeros(flat.size, dtype=bool)
    for j, rows in enumerate(below):
        if not rows or not np.isfinite(value[j]):
            continue
        reach = 2.0 * error[j] + (abs(nearest[j] - value[j]) if np.isfinite(nearest[j]) else 0.0)
        out[j] = any(abs(q - value[j]) > reach + AGREE_UNITS * r for q, r in rows)
    return out


def kept_where_contradicted(probe: TensorProbe, flat: np.ndarray, before: Judged, after: Judged,
                            which: np.ndarray, taken: list[Taken]) -> Judged:
    """``after`` with the coordinates ``which`` that it decided (``before`` did not) put back
    as ``before`` had them, with the reason, where the smaller steps contradict the verdict."""
    changed = which[after.status[which] != before.status[which]]
    if changed.size == 0:
        return after
    est = after.estimate.pick(changed)
    bad = contradicted(probe, flat[changed], est.value, est.error, taken)
    if not np.any(bad):
        return after
    back = before.pick(changed[bad])
    back = Judged(back.status, back.estimate, tuple(BELOW for _ in range(int(bad.sum()))), back.noise_limited,
                  back.crossed)
    return after.merged(changed[bad], back)


def kinks_beside(probe: TensorProbe, flat: np.ndarray, before: Judged, after: Judged, which: np.ndarray,
                 taken: list[Taken]) -> Judged:
    """``after`` with the coordinates ``which`` that it fails (``before`` did not) or leaves
    undecided judged `kink` where a kink at the point explains the discrepancy (see the
    module)."""
    from ..common.status import FAIL, INCONCLUSIVE  # local: the statuses this module needs are few

    status = after.status[which]
    unsettled = which[((status == FAIL) & (before.status[which] != FAIL)) | (status == INCONCLUSIVE)]
    if unsettled.size == 0:
        return after
    first_wide = probe.prior_steps(flat[unsettled]) * 2.0 ** WIDE_FIRST
    position = {int(k): j for j, k in enumerate(flat[unsettled])}
    rows: list[dict[float, tuple[float, float, float]]] = [{} for _ in unsettled]  # step -> (right, left, rounding)
    for where, _, pairs in taken:
        steps = 0.5 * (pairs.h_plus + pairs.h_minus)
        right, left = pairs.sides(probe.f0)
        with np.errstate(invalid="ignore", divide="ignore"):
            rounding = 2.0 * pairs.noise / np.minimum(pairs.h_plus, pairs.h_minus)
        for i, k in enumerate(where.tolist()):
            j = position.get(int(k))
            if j is not None and steps[i] >= first_wide[j] and np.isfinite(right[i] + left[i] + rounding[i]):
                rows[j][float(steps[i])] = (float(right[i]), float(left[i]), float(rounding[i]))
    a = probe.a[flat[unsettled]]
    kinked = np.zeros(unsettled.size, dtype=bool)
    for j, seen in enumerate(rows):
        apart = [(s, r, l, e) for s, (r, l, e) in sorted(seen.items()) if abs(r - l) > KINK_NOISE * e]
        spans = [(p, q) for n, p in enumerate(apart) for q in apart[n + 1:] if q[0] >= 2.0 * p[0]]
        for (s1, r1, l1, e1), (s2, r2, l2, e2) in spans:
            steady = abs(r1 - l1) >= KINK_STEADY * abs(r2 - l2)  # steps twice apart at least
            near1 = min(SIDE_UNITS * e1, SIDE_SHARE * abs(r1 - l1))
            near2 = min(SIDE_UNITS * e2, SIDE_SHARE * abs(r2 - l2))
            on_right = abs(a[j] - r1) <= near1 and abs(a[j] - r2) <= near2
            on_left = abs(a[j] - l1) <= near1 and abs(a[j] - l2) <= near2
            if steady and (on_right or on_left):
                kinked[j] = True
                break
    return as_kinks(after, unsettled[kinked])
