"""Directional checks: the analytic gradient . u against the slope of the loss along u.

For a unit direction u over a set S of a tensor's coordinates, the loss is evaluated at
x + t u and x - t u (two calls, whatever the size of S). What is extrapolated is the
discrepancy itself,

    y(t) = [ (f(x + d+) - f(x - d-)) / 2  -  a . (d+ + d-) / 2 ] / t,

where d+ and d- are the perturbations the forward really saw (read back from the perturbed
arrays), so rounding of x + t u cancels exactly. y(t) tends to (numeric - analytic) . u as
t -> 0 with even powers of t, which Ridders' tableau removes; its error estimate says
whether the discrepancy is significant. Because a random u weighs every element, a wrong
element of any size shows up as long as it exceeds the numeric noise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .differences import rounding_noise
from .evaluate import Evaluator, Perturbation
from .extrapolate import FIRST_STEP_EXPONENT, FIRST_STEP_FACTOR, CentralAt, extrapolate
from .steps import as_seen

SIGNIFICANCE = 4.0  # a discrepancy beyond 4 error estimates is real
CURVATURE_SPREAD = 0.05  # second-difference estimates 5% apart: not smooth along u


@dataclass(frozen=True)
class Slope:
    """Discrepancies (numeric - analytic) . u for several directions, with error estimates."""

    discrepancy: np.ndarray
    error: np.ndarray
    analytic: np.ndarray  # a . u per direction
    evaluations: int
    kink: np.ndarray  # the loss has kinks along u within the steps, and analytic lies between
    # the one-sided slopes: the discrepancy is the kinks', not evidence of a bug

    def significant(self) -> np.ndarray:
        return (np.abs(self.discrepancy) > SIGNIFICANCE * self.error) & ~self.kink


@dataclass
class _Row:
    t: float
    left: float  # one-sided discrepancy (f0 - f(x - d-)) / t - a . d- / t
    right: float
    noise: float


def _kinked(rows: list[_Row]) -> bool:
    """The loss is not smooth along the direction, and the analytic value lies between the
    one-sided slopes at the smallest step.

    Along a smooth direction (right - left) / t estimates the second derivative and is the
    same at every step, to O(t**2); kinks within the steps make it wander by far more.
    """
    if len(rows) < 2:
        return False
    curvature = np.array([(r.right - r.left) / r.t for r in rows])
    noise = np.array([SIGNIFICANCE * 2 * r.noise / r.t for r in rows])
    last = curvature[-1]
    size = np.maximum(np.abs(curvature), abs(last))
    wander = np.abs(curvature - last) > CURVATURE_SPREAD * size + noise + noise[-1]
    narrow = rows[-1]
    margin = SIGNIFICANCE * 2 * narrow.noise
    between = min(narrow.left, narrow.right) - margin <= 0 <= max(narrow.left, narrow.right) + margin
    return bool(wander.any() and between)


def needed_precision(a: np.ndarray, threshold: float) -> float:
    """The error at which a direction could show a threshold-sized error in one typical
    element: threshold * rms(a) * |u_i| with |u_i| ~ 1/sqrt(n), over the significance factor."""
    if a.size == 0:
        return 0.0
    rms = float(np.sqrt(np.mean(a**2)))
    return threshold * rms / np.sqrt(a.size) / SIGNIFICANCE


def random_directions(size: int, count: int, rng: np.random.Generator) -> list[np.ndarray]:
    """``count`` unit vectors of length ``size``, uniformly distributed on the sphere."""
    out = []
    for _ in range(count):
        g = rng.standard_normal(size)
        out.append(g / np.linalg.norm(g))
    return out


def _central(
    evaluator: Evaluator, tensor: str, flat: np.ndarray, x: np.ndarray, a: np.ndarray,
    units: list[np.ndarray], compute_dtype: np.dtype, f0: float, history: list[list[_Row]],
) -> CentralAt:
    eps = float(np.finfo(compute_dtype).eps)
    rms = float(np.sqrt(np.mean(x.astype(np.float64) ** 2))) if x.size else 0.0
    t0 = FIRST_STEP_FACTOR * eps**FIRST_STEP_EXPONENT * max(1.0, rms)
    base = as_seen(x, compute_dtype)

    def central(which: np.ndarray, scale: float) -> tuple[np.ndarray, np.ndarray]:
        t = t0 * scale
        requests: list[Perturbation] = []
        up, down = [], []
        for k in which:
            plus = (x + t * units[k]).astype(x.dtype)
            minus = (x - t * units[k]).astype(x.dtype)
            up.append(a @ (as_seen(plus, compute_dtype) - base))
            down.append(a @ (base - as_seen(minus, compute_dtype)))
            requests.append(Perturbation(tensor, flat, plus))
            requests.append(Perturbation(tensor, flat, minus))
        values = evaluator.losses(requests)
        f_plus, f_minus = values[0::2], values[1::2]
        right = ((f_plus - f0) - np.array(up)) / t
        left = ((f0 - f_minus) - np.array(down)) / t
        noise = rounding_noise(eps, 2.0 * t, f_plus, f_minus)
        for j, k in enumerate(which):
            history[k].append(_Row(t, float(left[j]), float(right[j]), float(noise[j])))
        return (right + left) / 2.0, noise

    return central


def slope(
    evaluator: Evaluator, tensor: str, flat: np.ndarray, x: np.ndarray, a: np.ndarray,
    units: list[np.ndarray], compute_dtype: np.dtype, f0: float,
    tolerance: float | None = None, precision: float | None = None,
) -> Slope:
    """Directional discrepancies over coordinates ``flat`` (values ``x``, analytic ``a``).

    A direction stops refining as soon as its discrepancy is clearly above ``tolerance``
    (default 0: clearly nonzero) or clearly below it, or once its error estimate is below
    ``precision``.
    """
    history: list[list[_Row]] = [[] for _ in units]
    central = _central(evaluator, tensor, flat, x, a, units, compute_dtype, f0, history)
    count = len(units)
    result = extrapolate(
        central, count, analytic=np.zeros(count), tolerance=np.full(count, tolerance or 0.0),
        precision=None if precision is None else np.full(count, precision),
    )
    analytic = np.array([a @ u for u in units])
    kink = np.array([_kinked(rows) for rows in history], dtype=bool)
    return Slope(result.value, result.error, analytic, result.evaluations, kink)
