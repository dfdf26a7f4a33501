"""Richardson extrapolation of central differences with an error estimate, in the tableau
form of Ridders ("Accurate computation of F'(x) and F'(x)F''(x)", Advances in Engineering
Software 4(2), 1982), vectorised over many coordinates.

Column 0 of the tableau holds central differences at steps h0, h0/r, h0/r**2, ...; column j
eliminates the h**(2j) error term. The error of an entry is estimated from its distance to
its two neighbours; a coordinate stops when the diagonal starts to grow (rounding has taken
over), and its answer is the entry with the smallest error estimate.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .differences import coordinate_pairs, rounding_noise
from .evaluate import Evaluator
from .steps import make_steps

RATIO = 1.4
ROWS = 8
FIRST_STEP_EXPONENT = 1.0 / 5.0  # h0 ~ 4 eps**(1/5) max(1, |x|): the best step of a 4th-order rule
FIRST_STEP_FACTOR = 4.0
GROWTH_STOP = 2.0


@dataclass(frozen=True)
class Extrapolated:
    value: np.ndarray
    error: np.ndarray  # estimated absolute error of ``value``
    evaluations: int


# A central difference along some family of perturbations: (coordinates, step scale) ->
# (difference quotients, rounding noise), both shaped like the coordinates.
CentralAt = Callable[[np.ndarray, float], tuple[np.ndarray, np.ndarray]]


def coordinate_central(
    evaluator: Evaluator, tensor: str, flat: np.ndarray, x: np.ndarray, compute_dtype: np.dtype
) -> CentralAt:
    """Central differences of single coordinates ``flat`` of ``tensor`` (values ``x``)."""
    eps = float(np.finfo(compute_dtype).eps)
    base_scale = FIRST_STEP_FACTOR * eps**FIRST_STEP_EXPONENT / eps ** (1.0 / 3.0)

    def central(which: np.ndarray, scale: float) -> tuple[np.ndarray, np.ndarray]:
        steps = make_steps(x[which], compute_dtype, scale * base_scale, power_of_two=False)
        f_plus, f_minus = coordinate_pairs(evaluator, tensor, flat[which], steps)
        width = steps.h_plus + steps.h_minus
        return (f_plus - f_minus) / width, rounding_noise(eps, width, f_plus, f_minus)

    return central


def extrapolate(
    central: CentralAt,
    count: int,
    analytic: np.ndarray | None = None,
    tolerance: np.ndarray | None = None,
    rows: int = ROWS,
    precision: np.ndarray | None = None,
) -> Extrapolated:
    """Ridders' tableau for ``count`` coordinates.

    With ``analytic`` and ``tolerance`` a coordinate also stops as soon as the verdict is
    clear: its analytic value is within ``tolerance`` of the estimate with room for the
    error, or further from it than ten error estimates. With ``precision`` it stops once
    its error estimate is below that.
    """
    best = np.full(count, np.nan)
    error = np.full(count, np.inf)
    active = np.ones(count, dtype=bool)
    prev = np.full((rows, count), np.nan)
    evaluations = 0
    scale = 1.0
    for row in range(rows):
        which = np.flatnonzero(active)
        if which.size == 0:
            break
        cur = np.full((rows, count), np.nan)
        col0, noise = central(which, scale)
        evaluations += 2 * which.size
        cur[0, which] = col0
        fac = RATIO**2
        for j in range(1, row + 1):
            cur[j, which] = (cur[j - 1, which] * fac - prev[j - 1, which]) / (fac - 1.0)
            fac *= RATIO**2
            est = np.maximum(
                np.abs(cur[j, which] - cur[j - 1, which]), np.abs(cur[j, which] - prev[j - 1, which])
            )
            est = np.maximum(est, 2.0 * noise)
            better = est <= error[which]
            best[which[better]] = cur[j, which[better]]
            error[which[better]] = est[better]
        if row == 0:
            best[which] = col0
        else:
            growing = np.abs(cur[row, which] - prev[row - 1, which]) >= GROWTH_STOP * error[which]
            active[which[growing]] = False
            if precision is not None:
                active[which[error[which] <= precision[which]]] = False
            if analytic is not None and tolerance is not None:
                gap = np.abs(analytic[which] - best[which])
                clear = (gap + error[which] <= tolerance[which]) | (
                    gap > 10.0 * error[which] + tolerance[which]
                )
                active[which[clear]] = False
        prev = cur
        scale /= RATIO
    return Extrapolated(best, error, evaluations)
