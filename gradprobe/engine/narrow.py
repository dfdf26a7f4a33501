"""How far a narrow gradient may leave its float64 run: the rounding it accumulates, measured,
and the kinks its rounding reaches.

Narrow code (float32, float16, ...) checked on its float64 run returns a narrow gradient that
differs from that run by the rounding its own computation accumulates. Two parts are measured
on the target, never assumed: how much the narrow backward's rounding varies from point to
point (point.Point.jitter, at the narrow values), and how much rounding propagates: the
float64 gradient moved by perturbing every floating value the code is given (params and
inputs) by PROPAGATION_UNITS units of the narrow type's roundoff u, in random directions, as
storing each value in that type does. Near a kink, or where large inputs cancel, the second
part reaches far above u.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import ProbeError
from ..tensors import Workspace, is_float
from .domain import quiet
from .gradients import validate
from .preflight import call_backward
from .ladder import Estimate
from .probe import TensorProbe
from .roundoff import unit_roundoff

PROPAGATION_UNITS = 2.0  # each value moves by this many units of roundoff (its storage and one operation)
PROPAGATION_SAMPLES = 2  # backward calls, each at its own random signs


def propagated_rounding(
    backward: Callable[..., Any], wide: Workspace, grad_output: np.ndarray | None,
    dtype: np.dtype, base: dict[str, np.ndarray], rng: np.random.Generator,
) -> dict[str, np.ndarray]:
    """Per tensor and flat coordinate, the largest change of the float64 gradient (``base``)
    when every floating value moves by PROPAGATION_UNITS * u of ``dtype``; {} when backward
    fails there (no evidence: the narrow gradient is then held to the threshold alone)."""
    u = unit_roundoff(dtype)
    spread: dict[str, np.ndarray] = {}
    names = [n for n in wide.names() if is_float(wide.owners[n])]
    try:
        for _ in range(PROPAGATION_SAMPLES):
            moved = {n: wide.owners[n] * (1.0 + PROPAGATION_UNITS * u * rng.choice([-1.0, 1.0], size=wide.owners[n].shape))
                     for n in names}
            with quiet():  # a moved point: the code's warnings there are not shown
                raw = call_backward(backward, wide.replacing(moved), grad_output, scratch=False)
            g = validate(raw, wide).values
            for name, b in base.items():
                if name in g:
                    change = np.abs(g[name].reshape(-1) - b)
                    spread[name] = np.maximum(spread[name], change) if name in spread else change
    except ProbeError:
        return {}
    return spread


def kink_within_reach(
    probe: TensorProbe, own: TensorProbe, flat: np.ndarray, narrow: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, Estimate] | None:
    """Which narrow gradients that leave their float64 run are explained by a kink of the
    float64 run within the narrow type's resolution: at one of the steps the narrow code would
    take (its first step, and 16 and 256 times smaller) the one-sided quotients of the float64
    run lie further apart than the narrow type's agreement and than curvature makes them, and
    the narrow value lies between them (narrow rounding puts the code on the kink, or on its
    other side, where the float64 run is just off it). With the estimate each is judged by."""
    n = flat.size
    steps = np.concatenate([own.prior_steps(flat) / 16.0**k for k in range(3)])
    p = probe.pairs(np.tile(flat, 3), steps)
    right, left = (q.reshape(3, n) for q in p.sides(probe.f0))
    noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(3, n)
    tol = own.threshold * scale
    # The gap curvature alone would give at each step, from the smallest step's gap.
    bend = np.abs(right[2] - left[2]) / steps.reshape(3, n)[2]
    curved = 2.0 * bend * steps.reshape(3, n)
    curved[2] = 0.0
    apart = np.abs(right - left) > tol + 2.0 * noise + curved
    between = (narrow >= np.minimum(left, right) - tol - noise) & (narrow <= np.maximum(left, right) + tol + noise)
    fits = apart & between
    took = fits.any(axis=0)
    if not took.any():
        return None
    row = np.argmax(fits, axis=0)  # the largest step that explains it
    cols = np.arange(n)
    lv, rv, nv = left[row, cols], right[row, cols], noise[row, cols]
    nearer = np.where(np.abs(narrow - lv) <= np.abs(narrow - rv), lv, rv)
    return took, Estimate(nearer[took], nv[took])
