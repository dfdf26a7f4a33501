"""Measuring how much the loss rounds, where |f| understates it.

A loss can be small while the terms it is computed from are large (a squared error of a
good fit over large values, a sum of signed terms): its rounding is then far above
eps |f|. Moving some params of every tensor (64 at most, chosen at random) by a few units in
their last place, in random directions, changes the loss by the analytic prediction a . d
(bounded by sum |a_i d_i|) plus rounding; what exceeds the prediction's bound is rounding,
seen directly. Three calls per target, memory independent of the tensors' sizes.

That residual is rounding only where the analytic prediction is right: a wrong gradient
leaves the loss changing along the move by more than it predicts, and a rounding scale
read off that would hide the very bug being looked for (an error of 1e-3 in a gradient of
1e17 beside the point's other terms). Where the residual sets the scale (above |f|), the
move that showed the largest is taken LINEAR_SPAN more times (:func:`_along_the_move`):
rounding scatters the loss from point to point, a slope the prediction misses grows with
the distance moved. Where the residuals at the 2..LINEAR_SPAN+1 fold moves grow in
proportion (their second differences, which cancel any slope, are a SLOPE_NOT_ROUNDING-th
of the largest residual at most), the residual was a slope, and the scale is what those
second differences show of the rounding (as :func:`measured_rounding` takes it).
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
    residual, worst = 0.0, None
    for _ in range(CALLS):
        bound = 0.0
        moves, steps = [], {}
        for n in names:
            x = ws.owners[n].flat[picked[n]]
            step = ULPS * np.spacing(np.abs(x)) * rng.choice([-1.0, 1.0], size=x.shape)
            steps[n] = step.astype(x.dtype)
            moved = (x + steps[n]).astype(x.dtype)
            moves.append(Perturbation(n, picked[n], moved))
            d = moved.astype(np.float64) - x.astype(np.float64)
            bound += float(np.sum(np.abs(analytic[n][picked[n]] * d)))
        try:
            value = evaluator.loss_with(moves)
        except (UserCodeError, BadOutputError):
            break  # outside forward's domain: no evidence either way; the checks that
            # follow name the coordinate if the same happens there
        if abs(value - f0) - 2.0 * bound > residual:
            residual, worst = abs(value - f0) - 2.0 * bound, (steps, value)
    scale = MARGIN * max(residual, 0.0) / (rounding_units * eps)
    if worst is None or scale <= abs(f0):
        return scale
    seen = _along_the_move(evaluator, ws, analytic, f0, picked, *worst)
    if seen is None or SLOPE_NOT_ROUNDING * seen > residual:
        return scale
    return MARGIN * seen / (rounding_units * eps)


LINEAR_SPAN = 4  # calls along the move whose residual set the scale: k = 2..LINEAR_SPAN + 1
SLOPE_NOT_ROUNDING = 16.0  # second differences this far below the residual: a slope missed


def _along_the_move(
    evaluator: Evaluator, ws: Workspace, analytic: dict[str, np.ndarray], f0: float,
    picked: dict[str, np.ndarray], steps: dict[str, np.ndarray], value: float,
) -> float | None:
    """The rounding of one loss value along the move ``steps`` (taken once, giving
    ``value``), seen from the residuals e_k = f(x + k d) - f0 - a . (k d) at k = 0..LINEAR_SPAN
    + 1: their second differences cancel a slope that a . d misses and keep the rounding
    (SPREAD_MARGIN times the largest, as :func:`measured_rounding`). None where forward
    fails there, where the moves do not stay k times the first (a binade crossed), or where
    the residuals do not grow in proportion to k (their signs differ from the first one's)."""
    first = {n: ws.owners[n].flat[picked[n]] for n in picked}
    e = [0.0]
    for k in range(1, LINEAR_SPAN + 2):
        moves, predicted = [], 0.0
        for n, x in first.items():
            moved = (x + k * steps[n]).astype(x.dtype)
            d = moved.astype(np.float64) - x.astype(np.float64)
            if not np.array_equal(d, k * steps[n].astype(np.float64)):
                return None
            moves.append(Perturbation(n, picked[n], moved))
            predicted += float(np.dot(analytic[n][picked[n]], d))
        try:
            loss = value if k == 1 else evaluator.loss_with(moves)
        except (UserCodeError, BadOutputError):
            return None
        e.append(loss - f0 - predicted)
    e_ = np.array(e)
    if not (np.all(np.isfinite(e_)) and np.all(np.sign(e_[1:]) == np.sign(e_[1]))):
        return None
    return SPREAD_MARGIN * float(np.abs(np.diff(e_, n=2)).max())


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
