"""Central and one-sided differences for a set of coordinates of one tensor."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .evaluate import Evaluator, Perturbation
from .steps import make_steps

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
    requests: list[Perturbation] = []
    for i in range(flat.size):
        index = flat[i : i + 1]
        requests.append(Perturbation(tensor, index, steps.plus[i : i + 1]))
        requests.append(Perturbation(tensor, index, steps.minus[i : i + 1]))
    values = evaluator.losses(requests)
    f_plus, f_minus = values[0::2], values[1::2]
    width = steps.h_plus + steps.h_minus
    eps = float(np.finfo(compute_dtype).eps)
    noise = ROUNDING_UNITS * eps * (np.abs(f_plus) + np.abs(f_minus) + abs(f0)) / width
    return Slopes(
        central=(f_plus - f_minus) / width,
        left=(f0 - f_minus) / steps.h_minus,
        right=(f_plus - f0) / steps.h_plus,
        noise=noise,
    )
