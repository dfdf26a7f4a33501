"""float32 code whose loss is cast to float32 (no float64 run), a coordinate 0.0066 from a kink:
the central quotients at the wide steps rounding needs cross it, while the loss along the other
side is linear out to the params' scale. The loss values along that side, fitted as one curve,
decide it (engine/side_fit.py); a wrong value there is never passed.

Scenario: pumps whose flow is fitted to four meters (a squared residual each, the loss's bulk),
whose valve settings pay an absolute-deviation cost from their set points, w * |a (v - k)|
(the third valve sits 0.0066 above its set point), and whose tilts add a periodic term.

References outside the project: d/du |u| = sign(u), d/du u**2 = 2 u and d/du sin(u) = cos(u)
(elementary, from memory); the analytic value used is checked against mpmath's high-precision differentiation
(mpmath.diff at 40 digits, one-sided away from the kink) of the same loss at the float32
values.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

SCALE = 75.87493896484375


def _pumps(wrong: float | None = None):
    """The target (forward, backward, params, inputs); ``wrong``: the analytic value given to
    the third valve instead of its exact one (None: correct)."""
    params = {"flow": np.array([22.148302, -11.5519705, -24.691563, -14.596337], dtype=np.float32),
              "valve": np.array([4.7547536, -9.639766, 1.2707424], dtype=np.float32)}
    inputs = {"a0": np.array([0.03074371, 0.02303367, 0.05448219, 0.03904723], dtype=np.float32),
              "k0": np.array([42.614624, -15.040109, -56.87129, -39.74848], dtype=np.float32),
              "w0": np.array([-0.66720283, -0.50691783, 0.07153217, -0.7602127], dtype=np.float32),
              "a1": np.array([0.13242683, 0.1394216, 0.14267455], dtype=np.float32),
              "k1": np.array([8.984857, 1.0436834, 1.2641817], dtype=np.float32),
              "w1": np.array([0.10424486, 0.50701004, 0.21869932], dtype=np.float32),
              "a2": np.array([0.10905396, 0.08197072, 0.09523593, 0.04982985, 0.10354149], dtype=np.float32),
              "k2": np.array([1.125865, 14.368414, 12.395648, 65.6218, -24.53433], dtype=np.float32),
              "w2": np.array([0.78448737, -0.7417156, -0.5538693, -0.94243777, 0.7321154], dtype=np.float32)}
    params["tilt"] = np.array([9.648266, 1.6526214, 3.1389258, 6.8558984, 2.694422], dtype=np.float32)

    def forward(p, i):
        u = i["a0"] * (p["flow"] - i["k0"])
        v = i["a1"] * (p["valve"] - i["k1"])
        z = i["a2"] * (p["tilt"] - i["k2"])
        total = np.sum(i["w0"] * u * u) + np.sum(i["w1"] * np.abs(v))
        return np.float32(SCALE * (total + np.sum(i["w2"] * np.sin(z))))

    def backward(p, i):
        u = i["a0"] * (p["flow"] - i["k0"])
        v = i["a1"] * (p["valve"] - i["k1"])
        g_valve = np.asarray(SCALE * i["w1"] * np.sign(v) * i["a1"], dtype=np.float32).copy()
        if wrong is not None:
            g_valve[2] = np.float32(wrong)
        z = i["a2"] * (p["tilt"] - i["k2"])
        return {"flow": np.asarray(SCALE * i["w0"] * 2 * u * i["a0"], dtype=np.float32), "valve": g_valve,
                "tilt": np.asarray(SCALE * i["w2"] * np.cos(z) * i["a2"], dtype=np.float32)}

    return forward, backward, params, inputs


def _mp_valve_gradient(params, inputs) -> float:
    """d loss / d valve[2] at the float32 values by mpmath.diff (40 digits), one-sided to the
    right (away from the kink, which lies 0.0066 to the left)."""
    a, k, w = (mpmath.mpf(float(inputs[n][2])) for n in ("a1", "k1", "w1"))
    with mpmath.workdps(40):
        return float(mpmath.diff(lambda x: mpmath.mpf(SCALE) * w * abs(a * (x - k)),
                                 mpmath.mpf(float(params["valve"][2])), direction=1))


def _status(result, name: str) -> str:
    return str(next(t for t in result.tensors if t.name == name).status)


def test_the_scenario_is_what_it_says():
    forward, backward, params, inputs = _pumps()
    assert 0.006 < float(params["valve"][2] - inputs["k1"][2]) < 0.007  # the kink within the wide steps
    exact = _mp_valve_gradient(params, inputs)
    assert abs(float(backward(params, inputs)["valve"][2]) - exact) <= 1e-6 * abs(exact)


def test_a_correct_valve_beside_its_kink_is_decided():
    forward, backward, params, inputs = _pumps()
    result = probe(forward, backward, params, inputs)
    assert _status(result, "valve") in ("pass", "kink"), result.tensors
    assert _status(result, "flow") == "pass" and _status(result, "tilt") == "pass"


@pytest.mark.parametrize("share", [1.006, 0.994, -1.0])
def test_a_wrong_valve_beside_its_kink_never_passes(share):
    """0.6% off either way (12 times the float32 threshold of 4.9e-4), and the slope of the
    kink's other side: each must fail or stay undecided, never pass."""
    forward, backward, params, inputs = _pumps()
    exact = _mp_valve_gradient(params, inputs)
    result = probe(*_pumps(wrong=share * exact)[:2], params, inputs)
    assert _status(result, "valve") in ("fail", "inconclusive"), result.tensors
