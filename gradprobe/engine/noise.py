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

from ..common.errors import BadOutputError, UserCodeError
from ..common.tensors import Workspace
from .evaluate import Perturbation
from .evaluator import Evaluator

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


SPAN = 4  # calls of the direct measurement: the loss at x + k d, k = 1..SPAN
SPREAD_MARGIN = 2.0  # one value's rounding is taken as this many times the largest second difference


def measured_rounding(
    evaluator: Evaluator, ws: Workspace, names: list[str], f0: float, rng: np.random.Generator,
    dtype: np.dtype | None = None,
) -> float:
    """The rounding of one loss value, seen directly (SPAN calls): the loss at x + k d,
    k = 0..SPAN, d moving some params of every tensor (PER_TENSOR at most, chosen at random)
    by ULPS units in their last place in random directions. Second differences cancel how
    the loss changes along d (linear at that scale, whatever the gradient, right or wrong)
    and keep how its rounding varies from point to point: with independent roundings of
    spread s each second difference spreads by sqrt(6) s, and SPREAD_MARGIN times the
    largest of SPAN - 1 of them is about five times s. 0.0 when forward fails there.
    ``dtype``: the type forward computes in; where it is coarser than a param's own (a cast
    to bfloat16 inside), units of its last place, since finer moves never reach the loss."""
    names = [n for n in names if n in ws.owners and ws.owners[n].size]
    picked = {n: rng.choice(ws.owners[n].size, size=min(PER_TENSOR, ws.owners[n].size), replace=False)
              for n in names}
    base = {n: ws.owners[n].flat[picked[n]] for n in names}
    steps = {n: ULPS * _spacing(x, dtype) * rng.choice([-1.0, 1.0], size=x.shape) for n, x in base.items()}
    values = [f0]
    try:
        for k in range(1, SPAN + 1):
            moves = [Perturbation(n, picked[n], (base[n] + k * steps[n]).astype(base[n].dtype)) for n in names]
            values.append(evaluator.loss_with(moves))
    except (UserCodeError, BadOutputError):
        return 0.0  # outside forward's domain: no evidence either way
    second = np.abs(np.diff(np.array(values), n=2))
    return SPREAD_MARGIN * float(second.max(initial=0.0))


def _spacing(x: np.ndarray, dtype: np.dtype | None) -> np.ndarray:
    """The spacing of ``x`` in its own type, or in ``dtype`` where that is coarser."""
    own = np.spacing(np.abs(x))
    if dtype is None or np.finfo(dtype).eps <= np.finfo(x.dtype).eps:
        return own
    coarse = np.abs(np.spacing(np.abs(x).astype(dtype))).astype(np.float64)
    return np.maximum(own.astype(np.float64), coarse).astype(x.dtype)
