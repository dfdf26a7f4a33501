"""A second look at coordinates judged at a kink: the same code at a point moved off it.

At a kink the numeric side sees only the two one-sided derivatives. Where one kink sits at
the point, a correct backward returns one of them (or a value between), and a value outside
fails. Where several kinks meet at the point (a max tied in many rows, a ReLU at zero for
many samples at once, upstream gradients of both signs), the values a correct backward may
return are no longer fixed by the two sides, the check has to accept a wide range, and a
wrong gradient can hide in it.

Moved by a small random step (every checked tensor at once, by MOVE of its scale, and at
least MOVE_STEPS first steps), and again by the opposite step (a ReLU that the one step
switches off, the other switches on), the kinks leave the point, the loss is smooth along those
coordinates, and the code's gradient there agrees with the numeric one or it does not. Only
a failure there changes the verdict: the coordinate fails, with the moved point's numbers
and a reason that says so. Any other outcome (a pass, a kink that did not move, a point
outside the code's domain) leaves the kink verdict as it was. Cost: the moved points'
preparation (about 6 calls and one backward call each, once per target) and the
coordinates' checks there.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any

import numpy as np

from ..errors import ProbeError
from ..tensors import Workspace
from .coordinates import CoordinateOutcome, check_coordinates
from .evaluate import LossFunction
from .point import Point, prepare
from .sampling import tensor_rng
from .status import FAIL, KINK
from .verdict import SIGNIFICANCE

MOVE = 2.0**-10  # of each element's scale (its own size or its tensor's rms)
MOVE_STEPS = 8.0  # and at least this many first steps, so that the kinks leave their reach
# A failure at a moved point counts only beyond SAFETY times the usual number of bounds: the
# kinks moved off the point still lie close by, and a kink whose jump is too small for the
# bend test can sit inside steps grown to beat rounding noise, where the tableau's bound is
# the least reliable (seen at 3.8 and 5.7 bounds on correct code; planted bugs at 3e3 and up).
SAFETY = 10.0

MOVED_FAIL = (
    "at a kink here; at a point moved off the kinks (every checked tensor moved by about "
    "{move:.0e} of its scale) the analytic gradient disagrees with the numeric one (values shown "
    "are the moved point's)"
)


class SecondLook:
    """Checks coordinates of any tensor at two moved points (opposite steps), prepared on
    first use."""

    def __init__(
        self, forward: Callable[..., Any], backward: Callable[..., Any], point: Point,
        threshold: float, seed: int, method: str,
    ) -> None:
        self._forward, self._backward = forward, backward
        self._point = point
        self._threshold, self._seed, self._method = threshold, seed, method
        self._moved: dict[float, Point | None] = {}

    def _moved_values(self, sign: float) -> dict[str, np.ndarray]:
        p = self._point
        eps = float(np.finfo(p.numerics.dtype).eps)
        moved: dict[str, np.ndarray] = {}
        for name in p.grads.values:
            x = p.ws.owners[name]
            values = x.astype(np.float64)
            rms = float(np.sqrt(np.mean(values**2))) if values.size else 0.0
            first_step = eps ** (1.0 / 3.0) * np.maximum(1.0, np.abs(values))
            size = np.maximum(MOVE * np.maximum(np.abs(values), rms), MOVE_STEPS * first_step)
            rng = tensor_rng(self._seed, name, "second look")
            direction = rng.choice([-1.0, 1.0], size=values.shape) * rng.uniform(0.5, 1.0, values.shape)
            moved[name] = (values + sign * direction * size).astype(x.dtype)
        return moved

    def _prepared(self, sign: float) -> Point | None:
        if sign not in self._moved:
            p = self._point
            params, inputs = p.ws.trees_with(self._moved_values(sign))
            ws = Workspace(params, inputs)
            evaluator = p.evaluator.sibling(LossFunction(self._forward, ws, None))
            try:
                ready = prepare(self._forward, self._backward, ws, evaluator, self._seed)
                ready.measure(self._seed)
            except ProbeError:  # outside the code's domain there: no evidence either way
                self._moved[sign] = None
            else:
                self._moved[sign] = ready
        return self._moved[sign]

    def outcomes(self, name: str, flat: np.ndarray) -> list[CoordinateOutcome]:
        """The coordinates ``flat`` of ``name`` checked at each moved point usable."""
        found = []
        for sign in (1.0, -1.0):
            moved = self._prepared(sign)
            if moved is None or name not in moved.grads.values:
                continue
            try:
                found.append(check_coordinates(moved.probe(name, self._threshold), flat, self._method))
            except ProbeError:
                continue
        return found


def settle_kinks(outcome: CoordinateOutcome, look: SecondLook | None, name: str) -> CoordinateOutcome:
    """``outcome`` with its kink coordinates that fail at a moved point failed (with the
    numbers of the moved point where they fail worst)."""
    kinked = np.flatnonzero(outcome.status == KINK)
    if look is None or kinked.size == 0:
        return outcome
    fields = {f: getattr(outcome, f).copy() for f in
              ("analytic", "numeric", "error_estimate", "rel", "abs", "scale", "status")}
    reasons = list(outcome.reasons)
    for moved in look.outcomes(name, outcome.flat[kinked]):
        plain = moved.abs > SAFETY * SIGNIFICANCE * moved.error_estimate
        worse = (fields["status"][kinked] != FAIL) | (moved.rel > fields["rel"][kinked])
        failed = (moved.status == FAIL) & plain & worse
        where, k = kinked[failed], np.flatnonzero(failed)
        for field, values in fields.items():
            values[where] = getattr(moved, field)[k]
        for j in where.tolist():
            reasons[j] = MOVED_FAIL.format(move=MOVE)
    return replace(outcome, reasons=tuple(reasons), **fields)
