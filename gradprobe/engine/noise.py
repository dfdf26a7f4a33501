"""Measuring how much the loss rounds, where |f| understates it.

A loss can be small while the terms it is computed from are large (a squared error of a
good fit over large values, a sum of signed terms): its rounding is then far above
eps |f|. Moving some params of every tensor (64 at most, chosen at random) by a few units in
their last place, in random directions, changes the loss by the analytic prediction a . d
(bounded by sum |a_i d_i|) plus rounding; what exceeds the prediction's bound is rounding,
seen directly. Three calls per target, memory independent of the tensors' sizes.
"""

from __future__ import annotations

import numpy as np

from ..errors import BadOutputError, UserCodeError
from ..tensors import Workspace
from .evaluate import Evaluator, Perturbation

CALLS = 3
ULPS = 4.0  # each moved param moves by this many units of its own last place
PER_TENSOR = 64  # params moved per tensor: enough to change how the loss rounds
MARGIN = 4.0  # the noise taken is this many times the largest residual seen


def measured_loss_scale(
    evaluator: Evaluator, ws: Workspace, analytic: dict[str, np.ndarray], f0: float,
    rounding_units: float, rng: np.random.Generator,
) -> float:
    """A loss scale L such that rounding_units * eps * L covers the rounding seen."""
    names = [n for n in analytic if n in ws.owners and ws.owners[n].size]
    if not names:
        return 0.0
    eps = float(np.finfo(np.float64).eps)
    picked = {n: rng.choice(ws.owners[n].size, size=min(PER_TENSOR, ws.owners[n].size),
                            replace=False) for n in names}
    residual = 0.0
    for _ in range(CALLS):
        bound = 0.0
        moves = []
        for n in names:
            x = ws.owners[n].flat[picked[n]]
            step = ULPS * np.spacing(np.abs(x)) * rng.choice([-1.0, 1.0], size=x.shape)
            moved = (x + step.astype(x.dtype)).astype(x.dtype)
            moves.append(Perturbation(n, picked[n], moved))
            d = moved.astype(np.float64) - x.astype(np.float64)
            bound += float(np.sum(np.abs(analytic[n][picked[n]] * d)))
        try:
            change = abs(evaluator.loss_with(moves) - f0)
        except (UserCodeError, BadOutputError):
            break  # outside forward's domain: no evidence either way; the checks that
            # follow name the coordinate if the same happens there
        residual = max(residual, change - 2.0 * bound)
    return MARGIN * max(residual, 0.0) / (rounding_units * eps)
