"""How far the analytic gradient moves when the point moves by a few units in its last place.

Floating-point code returns its formula at values within a few units of the point (backward
error analysis, common practice), so a discrepancy no larger than that motion is no bug's.
References: d(w**3)/dw = 3 w**2 and d|w|/dw = sign(w) (tables of derivatives, common
practice); the sizes of the motion follow from them and from np.spacing.
"""

from __future__ import annotations

import numpy as np

from gradprobe.engine.evaluate import Evaluator, LossFunction
from gradprobe.engine.point import JITTER_ULPS, prepare
from gradprobe.tensors import Workspace


def _point(forward, backward, w):
    ws = Workspace({"w": np.array(w, dtype=float)}, {})
    return prepare(forward, backward, ws, Evaluator(LossFunction(forward, ws, None)), 0)


def test_smooth_code_moves_by_its_second_derivative_times_the_ulps():
    w = np.array([0.3, -1.7, 12.0])
    point = _point(lambda p, i: float(np.sum(p["w"] ** 3)), lambda p, i: {"w": 3 * p["w"] ** 2}, w)
    jitter = point.jitter("w")
    expected = 6 * np.abs(w) * JITTER_ULPS * np.spacing(np.abs(w))  # |f''| * |d|
    assert np.all(jitter <= 2 * expected + 4 * np.spacing(3 * w**2))
    assert np.all(jitter >= 0.5 * expected - 4 * np.spacing(3 * w**2))


def test_a_kink_at_the_point_is_not_taken_for_motion():
    """|w| at w = 0 (sign(0) = 0): the first move crosses the kink (a jump of 1), the second
    pair of points lies on one side of it, so the jitter stays at rounding level."""
    w = np.array([0.0, 0.8])
    point = _point(lambda p, i: float(np.sum(np.abs(p["w"]))), lambda p, i: {"w": np.sign(p["w"])}, w)
    assert np.all(point.jitter("w") < 1e-12)
