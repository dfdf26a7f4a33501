"""Checks that the loss along a coordinate is smooth across the steps of a curve fitted to its
central quotients (:mod:`.fitted`), beyond what the quotients themselves can show.

A central quotient sees only the odd part of the loss along the coordinate. A kink at a
distance e from the point closer than every step (c |y - k| with |x - k| = e < s) adds
c e / s to each quotient: where e lies far below the steps that term hides in the quotients'
rounding, they follow the curve f' + c2 s**2 + c4 s**4 within it, and the fit reads the
smooth part's slope while the derivative at the point is that slope plus c or minus c (a
correct float32 |a (p - k)| with p - k = -2.1e-5 read as -0.00077 +- 0.00039 against its true
-2.4485 at steps from 0.03 to 0.25).

The even part shows such a kink: E(s) = (f(x + s) + f(x - s)) / 2 - f(x) is
f'' s**2 / 2 + f'''' s**4 / 24 + ... where the loss is smooth across the steps, and a kink
nearer than s adds c (s - e), a term in s that model has not. E at the fit's own pairs
(moves of unequal length weighed so that the linear part cancels) and the point's own value
(its rounding as one more observation) are fitted as e0 + k s + e2 s**2 + e4 s**4 (and with
a term in s**6); the curve stands only where k lies within SIGNIFICANCE of its standard error
and the residuals spread no more than the fit's limit allows in one of them
(:func:`unseen_kink`). That test has limited power: a kink whose slope jumps by less than
|k| plus SIGNIFICANCE standard errors (over the steps' top) stays unseen, and moves the
derivative at the point from the fit's by up to that jump (c itself, plus its pull on the fit
through c e / s): a failure read off the curve must lie beyond that too.

The quotients taken before at smaller steps (the ladders') must continue the curve: each
within WIDE_NOISE times its rounding plus the fit's bound of the curve at its step
(:func:`continued`); a kink between them and the fit's steps moves them off it, as the wide
steps' windows and the one-sided fits require of theirs.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .probe import Pairs
from .refine import Taken
from .verdict import SIGNIFICANCE
from .wide_steps import WIDE_NOISE

Smaller = list[tuple[float, float, float]]  # (quotient, step, rounding) per pair taken below the fit's steps


def even_part(p: Pairs, f0: float) -> np.ndarray:
    """E(s) - f(x) of each pair: the two losses weighed by the other side's move (a linear
    loss cancels exactly however unequal the moves)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return (p.h_minus * p.f_plus + p.h_plus * p.f_minus) / (p.h_plus + p.h_minus) - f0


def unseen_kink(even: np.ndarray, s: np.ndarray, sigma: float, limit: float) -> float | None:
    """The largest slope jump a kink among steps ``s`` could have that the even parts ``even``
    there (sigma: one loss value's rounding) leave unseen: |k| plus SIGNIFICANCE standard
    errors of the fit e0 + k s + e2 s**2 + e4 s**4, or of that with a term in s**6 (a loss
    that bends strongly across wide steps puts its higher terms partly on s), the first
    whose residuals spread within ``limit`` times sigma and whose k lies within SIGNIFICANCE
    standard errors; None where neither does (a kink, or no smooth even part, shows)."""
    if not (np.all(np.isfinite(even)) and sigma > 0 and even.size > 6):
        return None
    top = float(s.max())
    u = s / top
    y = np.append(even, 0.0)  # the point's own value: E(0) = 0 within its rounding
    weight = np.append(np.full(even.size, np.sqrt(2.0)), 1.0)  # 1 / each value's rounding, in sigmas
    for powers in ((0, 1, 2, 4), (0, 1, 2, 4, 6)):
        x = np.vstack([np.stack([u**k for k in powers], axis=1), [1.0] + [0.0] * (len(powers) - 1)])
        xw = x * weight[:, None]
        coef, *_ = np.linalg.lstsq(xw, y * weight, rcond=None)
        cov = np.linalg.pinv(xw.T @ xw)
        seen = float(np.sqrt(np.sum(((y - x @ coef) * weight) ** 2) / (y.size - len(powers))))
        linear = SIGNIFICANCE * float(np.sqrt(max(cov[1, 1], 0.0))) * max(sigma, seen)
        if seen <= limit * sigma and abs(coef[1]) <= linear:
            return (abs(float(coef[1])) + linear) / top  # E = jump * s: k (per unit s / top) over top
    return None


def smaller_central(flat: np.ndarray, below: np.ndarray, taken: list[Taken], f0: float) -> list[Smaller]:
    """Per coordinate ``flat[i]``, the central quotients of the pairs ``taken`` at steps below
    ``below[i]``, with their steps and rounding (that of the two losses, and the first-order
    term unequal moves leave, from the one-sided gap)."""
    pos = {int(c): i for i, c in enumerate(flat.tolist())}
    out: list[Smaller] = [[] for _ in range(flat.size)]
    for where, _, p in taken:
        d = p.central
        right, left = p.sides(f0)
        width = p.h_plus + p.h_minus
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            rounding = 2.0 * p.noise / width + np.abs(right - left) * np.abs(p.h_plus - p.h_minus) / width
        for k, c in enumerate(where.tolist()):
            i = pos.get(int(c))
            step = 0.5 * float(width[k])
            if i is None or not (0.0 < step < below[i]) or not (np.isfinite(d[k]) and np.isfinite(rounding[k])):
                continue
            out[i].append((float(d[k]), step, float(rounding[k])))
    return out


def continued(curve: Callable[[np.ndarray], np.ndarray], bound: float, smaller: Smaller) -> bool:
    """Whether every quotient in ``smaller`` lies within WIDE_NOISE times its rounding plus
    ``bound`` of the fitted ``curve`` at its step."""
    if not smaller:
        return True
    q, s, e = (np.array(v) for v in zip(*smaller))
    return bool(np.all(np.abs(q - curve(s)) <= WIDE_NOISE * e + bound))


__all__ = ["continued", "even_part", "smaller_central", "unseen_kink"]
