"""How finely backward's value is defined: the fuzz of the analytic gradient.

Floating-point code returns its formula with rounding errors that vary from point to point.
Second differences of the gradient at points a few units in the last place apart cancel how
the gradient really changes and keep that variation. References: mpmath at 60 digits for the
exact gradient of a least-squares fit, d(w**3)/dw = 3 w**2 and d|w|/dw = sign(w) (tables of
derivatives, common practice).
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe.engine.evaluate import LossFunction
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.point import prepare
from gradprobe.common.tensors import Workspace


def _point(forward, backward, params, inputs=None, seed=0):
    ws = Workspace(params, inputs or {})
    return prepare(forward, backward, ws, Evaluator(LossFunction(forward, ws, None)), seed)


def _fit(seed):
    """Crop yields from three soil readings, fitted to within 1e-12 of readings of size ~100:
    the residual is a difference of much larger numbers, so backward's float64 gradient
    carries a rounding error far above float64's unit."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(8, 3)) * 100
    w = rng.normal(size=3)
    y = x @ w + 1e-12 * rng.normal(size=8)
    return w, x, y


def _forward(p, i):
    return float(np.sum((i["x"] @ p["w"] - i["y"]) ** 2))


def _backward(p, i):
    return {"w": 2 * i["x"].T @ (i["x"] @ p["w"] - i["y"])}


def _exact(w, x, y):
    with mpmath.workdps(60):
        mp = np.vectorize(lambda v: mpmath.mpf(float(v)), otypes=[object])
        r = mp(x) @ mp(w) - mp(y)
        return np.array([float(v) for v in 2 * (mp(x).T @ r)])


def test_the_fuzz_bounds_backwards_rounding_error_within_three_times():
    """Over 60 fits, the float64 gradient's distance from the exact one (mpmath) is at most
    3 times the measured fuzz, coordinate by coordinate: the allowance a failure must beat."""
    worst = 0.0
    for seed in range(60):
        w, x, y = _fit(seed)
        inputs = {"x": x, "y": y}
        fuzz = _point(_forward, _backward, {"w": w}, inputs).jitter("w")
        exact = _exact(w, x, y)
        error = np.abs(_backward({"w": w}, inputs)["w"] - exact)
        assert np.max(error / np.abs(exact)) > 1e-6  # rounding above the default threshold
        worst = max(worst, float(np.max(error / fuzz)))
    assert worst <= 3.0, worst


def test_well_conditioned_code_has_fuzz_at_its_rounding_level():
    w = np.array([0.3, -1.7, 12.0])
    point = _point(lambda p, i: float(np.sum(p["w"] ** 3)), lambda p, i: {"w": 3 * p["w"] ** 2}, {"w": w})
    assert np.all(point.jitter("w") <= 8 * np.spacing(3 * w**2))


def test_a_kink_at_the_point_is_not_taken_for_fuzz():
    """|w| at w = 0 (sign(0) = 0): the first move crosses the kink (a jump of 1); every
    second difference is taken on one side of it."""
    w = np.array([0.0, 0.8])
    point = _point(lambda p, i: float(np.sum(np.abs(p["w"]))), lambda p, i: {"w": np.sign(p["w"])}, {"w": w})
    assert np.all(point.jitter("w") < 1e-12)


@pytest.mark.parametrize("seed", [0, 1])
def test_a_sign_bug_is_not_excused_by_the_fuzz(seed):
    """The same fits with the gradient's sign flipped fail: the flip is far above the fuzz."""
    from gradprobe import probe

    w, x, y = _fit(seed)
    report = probe(_forward, lambda p, i: {"w": -_backward(p, i)["w"]}, {"w": w}, {"x": x, "y": y})
    assert report.tensor("w").status == "fail"


def test_the_fuzz_measure_draws_from_the_run_s_seed():
    """--seed seeds every draw: the jitter's random signs too. Two seeds give different
    draws, each within the bound of the fit's rounding above."""
    w, x, y = _fit(0)
    fuzz = [_point(_forward, _backward, {"w": w}, {"x": x, "y": y}, seed=s).jitter("w") for s in (1, 2)]
    assert not np.array_equal(fuzz[0], fuzz[1])
    error = np.abs(_backward({"w": w}, {"x": x, "y": y})["w"] - _exact(w, x, y))  # mpmath
    assert all(np.all(error <= 3.0 * f) for f in fuzz)
    again = _point(_forward, _backward, {"w": w}, {"x": x, "y": y}, seed=1).jitter("w")
    assert np.array_equal(fuzz[0], again)
