"""Verdicts taken on wide steps, checked against the quotients at the smaller steps.

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
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe
from .refine import Taken
from .verdict import Judged
from .wide_steps import WIDE_FIRST

AGREE_UNITS = 8.0  # a smaller step's quotient may stray from the verdict by this many of its rounding
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
