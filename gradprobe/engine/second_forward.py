"""Forward's side of second derivatives (check 2), independent of backward.

:func:`mixed_difference`: ``u·H v`` from forward alone, as the mixed second difference
``[f(x+hu+kv) - f(x+hu-kv) - f(x-hu+kv) + f(x-hu-kv)] / 4hk`` at three step sizes, with an
error bound from how the three disagree and from the loss's measured rounding.
:func:`mixed_sides`: whether forward has a kink at the point along ``u`` or ``v``.
"""

from __future__ import annotations

import math

import numpy as np

from ..common.classes import dataclass
from .evaluate import Perturbation
from .evaluator import Evaluator
from .second_numeric import power_of_two
from .second_source import Layout

# Doubling the steps of a second difference multiplies its h**2 truncation by 4; the three
# values are trusted when successive differences grow by a ratio near that (2 to 8), or
# stay within MODEL_NOISE times the rounding.
MODEL_RATIO = (2.0, 8.0)
MODEL_NOISE = 8.0
WIDEN = 3  # times the steps of a second difference may widen fourfold


@dataclass(frozen=True)
class Mixed:
    """``u·H v`` from forward's second differences, with its error bound."""

    value: float
    error: float
    evaluations: int


def mixed_difference(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                     v: np.ndarray, eps: float, noise: float, g0: np.ndarray) -> Mixed:
    """The mixed second difference of forward along ``u`` and ``v`` at three step sizes
    (12 forward calls). The first steps are eps**(1/4) times the moved coordinates' size, the
    best order for a second difference; where the function's own rounding then outweighs its
    truncation (a large loss with small curvature), the steps widen fourfold, up to WIDEN
    times, and the tightest bound is kept. The error bound is the difference of the two
    smallest steps' values (three times the smallest one's truncation when the h**2 model
    holds), the change of the Richardson estimates between step pairs, and the rounding of
    four loss values (the measured loss noise, plus what rounding the moved points changes)."""
    sizes = []
    for d in (u, v):
        moved = d != 0
        size = max(1.0, float(np.max(np.abs(x[moved])))) if moved.any() else 1.0
        sizes.append(power_of_two(eps ** 0.25 * size))
    shift_noise = eps * float(np.sum(np.abs(g0) * np.abs(x)))
    best, calls = None, 0
    for _ in range(WIDEN + 1):
        value, error, truncation, rounding = _three_steps(evaluator, layout, x, u, v, sizes,
                                                          noise + shift_noise)
        calls += 12
        if best is None or error < best[1]:
            best = (value, error)
        if not math.isfinite(error) or rounding <= MODEL_NOISE * truncation:
            break
        sizes = [4.0 * s for s in sizes]
    assert best is not None
    return Mixed(best[0], best[1], calls)


def _three_steps(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                 v: np.ndarray, sizes: list[float], noise: float) -> tuple[float, float, float, float]:
    """The Richardson value, its error bound, the truncation and rounding parts."""
    values = []
    for c in (1.0, 2.0, 4.0):
        hu, kv = c * sizes[0], c * sizes[1]
        total = 0.0
        for su, sv, sign in ((1, 1, 1.0), (1, -1, -1.0), (-1, 1, -1.0), (-1, -1, 1.0)):
            total += sign * _loss_at(evaluator, layout, x + su * hu * u + sv * kv * v)
        values.append(total / (4 * hu * kv))
    f1, f2, f4 = values
    r12, r24 = (4 * f1 - f2) / 3, (4 * f2 - f4) / 3
    rounding = noise / (sizes[0] * sizes[1])
    truncation = abs(f1 - f2) + abs(r12 - r24)
    error = truncation + 2 * rounding
    d12, d24 = f2 - f1, f4 - f2
    if max(abs(d12), abs(d24)) > MODEL_NOISE * rounding and not (
            d12 != 0 and MODEL_RATIO[0] <= d24 / d12 <= MODEL_RATIO[1]):
        error = math.inf  # the steps' values do not change as h**2 predicts (a kink of
        # forward inside the steps): no bound can be claimed
    return r12, error, truncation, rounding


def _loss_at(evaluator: Evaluator, layout: Layout, point: np.ndarray) -> float:
    ws = evaluator.loss.workspace
    moves = []
    for name in layout.names:
        owner = ws.owners[name]
        values = point[layout.part(name)].astype(owner.dtype)
        if np.array_equal(values, owner.reshape(-1)):
            continue
        moves.append(Perturbation(name, slice(0, owner.size), values))
    return float(evaluator.loss_with(moves))


def mixed_sides(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                v: np.ndarray, eps: float, noise: float, f0: float) -> bool:
    """Whether forward has a kink at the point along ``u`` or ``v``: one-sided mixed
    differences on the two sides of each (each extrapolated over three step sizes, 24
    forward calls) that differ by more than their errors. Forward's second differences say
    nothing about a Hessian there."""
    sizes = []
    for d in (u, v):
        moved = d != 0
        size = max(1.0, float(np.max(np.abs(x[moved])))) if moved.any() else 1.0
        sizes.append(power_of_two(eps ** 0.25 * size))
    f = {}
    for c in (1.0, 2.0, 4.0):
        hu, kv = c * sizes[0] * u, c * sizes[1] * v
        for su in (-1, 0, 1):
            for sv in (-1, 0, 1):
                if (su, sv) != (0, 0):
                    f[c, su, sv] = _loss_at(evaluator, layout, x + su * hu + sv * kv)
    for axis in (0, 1):
        sides = []
        for sign in (1, -1):
            values = []
            for c in (1.0, 2.0, 4.0):
                def at(a: int, b: int) -> float:
                    key = (c, a, b) if axis == 0 else (c, b, a)
                    return f0 if key[1:] == (0, 0) else f[key]
                if sign > 0:
                    q = at(1, 1) - at(1, -1) - at(0, 1) + at(0, -1)
                else:
                    q = at(0, 1) - at(0, -1) - at(-1, 1) + at(-1, -1)
                values.append(q / (2 * c * c * sizes[0] * sizes[1]))
            f1, f2, f4 = values
            e12, e24 = 2 * f1 - f2, 2 * f2 - f4
            rounding = 4 * noise / (sizes[0] * sizes[1])
            sides.append((e12, abs(f1 - f2) + abs(e12 - e24) + rounding))
        (plus, err_p), (minus, err_m) = sides
        if abs(plus - minus) > 2 * (err_p + err_m):
            return True
    return False
