"""Central and one-sided differences for a set of coordinates of one tensor."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .evaluate import Evaluator, Perturbation
from .steps import Steps, make_steps

# Rounding noise of one loss value is taken as ROUNDING_UNITS * eps * |f|: a forward is a
# chain of operations each rounding once, so a few units of eps (common practice).
ROUNDING_UNITS = 8.0


@dataclass(frozen=True)
class Slopes:
    """Difference quotients at one step per coordinate, with an estimate of their rounding noise."""

    central: np.ndarray
    left: np.ndarray
    right: np.ndarray
    noise: np.ndarray  # rounding noise of ``central``

    @property
    def gap(self) -> np.ndarray:
        return self.right - self.left


def rounding_noise(eps: float, width: np.ndarray | float, *values: np.ndarray | float) -> np.ndarray:
    """Rounding noise of a difference quotient over ``width`` of the loss ``values``."""
    return ROUNDING_UNITS * eps * sum(np.abs(v) for v in values) / width


def coordinate_pairs(
    evaluator: Evaluator, tensor: str, flat: np.ndarray, steps: Steps
) -> tuple[np.ndarray, np.ndarray]:
    """The loss at x + h and at x - h for each coordinate ``flat[i]`` (one batch)."""
    requests: list[Perturbation] = []
    for i in range(flat.size):
        index = flat[i : i + 1]
        requests.append(Perturbation(tensor, index, steps.plus[i : i + 1]))
        requests.append(Perturbation(tensor, index, steps.minus[i : i + 1]))
    values = evaluator.losses(requests)
    return values[0::2], values[1::2]


def slopes(
    evaluator: Evaluator,
    tensor: str,
    flat: np.ndarray,
    x: np.ndarray,
    f0: float,
    compute_dtype: np.dtype,
    scale: float = 1.0,
) -> Slopes:
    """Two evaluations per coordinate at x +- h, sharing the base value ``f0``."""
    steps = make_steps(x, compute_dtype, scale)
    f_plus, f_minus = coordinate_pairs(evaluator, tensor, flat, steps)
    width = steps.h_plus + steps.h_minus
    noise = rounding_noise(float(np.finfo(compute_dtype).eps), width, f_plus, f_minus, f0)
    return Slopes(
        central=(f_plus - f_minus) / width,
        left=(f0 - f_minus) / steps.h_minus,
        right=(f_plus - f0) / steps.h_plus,
        noise=noise,
    )
