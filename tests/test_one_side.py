"""float32 code whose loss is cast to float32 (no float64 run), with a unit switched off just
beside its kink: the central quotients at the wide steps rounding needs cross the kink on one
side, while the loss along the other side is flat out to the params' scale. One side's
quotients decide the coordinate (engine/one_side.py); a wrong value there is never passed.

Scenario: greenhouse heaters that switch on as the night temperature drops below a set point
(cost w * max(a * (t - k), 0), a < 0) and vent settings with a Huber penalty on their
distance from a target (steep: the penalty's corners lie ~0.01 from the settings). The
first greenhouse's reading sits 8.3e-4 above its set point: its heater is off, and the cost's
derivative in that reading is exactly 0 (d/du max(u, 0) = 0 for u < 0, from memory), its kink
8.3e-4 to the left.

References outside the project: the derivatives d/du max(u, 0) = [u > 0] and d/du huber(u) =
clip(u, -1, 1) (elementary, from memory); every analytic value used is checked against
mpmath's high-precision differentiation (mpmath.diff at 40 digits) of the same loss at the
float32 values, one-sided where a kink lies within mpmath's own step.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

SCALE = 0.03494447097182274


def _greenhouses(wrong: float | None = None):
    """The target (forward, backward, params, inputs); ``wrong``: the analytic value given to
    the switched-off heater's reading instead of its exact 0 (None: correct)."""
    params = {"reading": np.array([-6.4550138, -2.327824, -6.938118], dtype=np.float32),
              "vent": np.array([-0.00480886, 0.00490208, -0.00611024], dtype=np.float32)}
    inputs = {"a0": np.array([-0.08778365, -0.08941807, -0.12675084], dtype=np.float32),
              "k0": np.array([-6.455844, -2.1700642, -8.971503], dtype=np.float32),
              "w0": np.array([-0.3623377, -0.01782898, -0.989662], dtype=np.float32),
              "a1": np.array([63.1206, 77.00743, 89.850136], dtype=np.float32),
              "k1": np.array([0.02204377, 0.03341765, 0.0050194], dtype=np.float32),
              "w1": np.array([-0.22933385, 0.6151585, 0.14818838], dtype=np.float32)}

    def forward(p, i):
        u = i["a0"] * (p["reading"] - i["k0"])
        heat = np.sum(i["w0"] * np.maximum(u, 0))
        v = i["a1"] * (p["vent"] - i["k1"])
        vents = np.sum(i["w1"] * np.where(np.abs(v) <= 1, 0.5 * v * v, np.abs(v) - 0.5))
        return np.float32(SCALE * (heat + vents))

    def backward(p, i):
        u = i["a0"] * (p["reading"] - i["k0"])
        g_reading = SCALE * i["w0"] * (u > 0) * i["a0"]
        v = i["a1"] * (p["vent"] - i["k1"])
        g_vent = SCALE * i["w1"] * np.clip(v, -1, 1) * i["a1"]
        g_reading = np.asarray(g_reading, dtype=np.float32).copy()
        if wrong is not None:
            g_reading[0] = np.float32(wrong)
        return {"reading": g_reading, "vent": np.asarray(g_vent, dtype=np.float32)}

    return forward, backward, params, inputs


def _mp_reading_gradient(params, inputs, side: int = 0, shift: float = 0.0) -> np.ndarray:
    """d loss / d reading at the float32 values (moved by ``shift``) by mpmath.diff (40
    digits); ``side`` +1/-1 for a one-sided derivative (beside a kink), 0 central."""
    mp = lambda a: [mpmath.mpf(float(v)) for v in np.ravel(a)]  # noqa: E731
    t = [v + mpmath.mpf(shift) for v in mp(params["reading"])]
    a0, k0, w0 = mp(inputs["a0"]), mp(inputs["k0"]), mp(inputs["w0"])

    def heat(tt):
        return mpmath.mpf(SCALE) * sum(w * max(a * (x - k), 0) for w, a, x, k in zip(w0, a0, tt, k0))

    with mpmath.workdps(40):
        return np.array([float(mpmath.diff(lambda v, k=k: heat(t[:k] + [v] + t[k + 1:]), t[k], direction=side))
                         for k in range(3)])


def test_the_scenario_is_what_it_says():
    forward, backward, params, inputs = _greenhouses()
    # The first heater is off, 8.3e-4 above its set point: its kink lies within every wide step.
    u = inputs["a0"] * (params["reading"] - inputs["k0"])
    assert u[0] < 0 and 0 < params["reading"][0] - inputs["k0"][0] < 1e-3
    g = backward(params, inputs)["reading"]
    # From the right (away from the kink) the exact derivative is 0, as the backward says.
    exact = _mp_reading_gradient(params, inputs, side=+1)
    assert exact[0] == 0.0 and g[0] == 0.0
    np.testing.assert_allclose(g, exact, rtol=1e-6, atol=1e-12)
    # The loss along the reading is flat to the right out to the params' scale, in float32.
    x = params["reading"].copy()
    f0 = forward(params, inputs)
    for s in (1e-3, 0.1, 1.0, 4.0):
        x[0] = params["reading"][0] + np.float32(s)
        assert forward({**params, "reading": x}, inputs) == f0


def test_the_switched_off_heater_passes_on_its_flat_side():
    forward, backward, params, inputs = _greenhouses()
    report = probe(forward, backward, params, inputs, seed=0)
    reading = report.tensor("reading")
    assert reading.status == "pass", [d.reason for d in reading.details]
    assert report.tensor("vent").status != "fail"


@pytest.mark.parametrize("wrong", [
    pytest.param(0.0011115, id="the-other-side-slope"),  # w0 a0 SCALE: the heater taken as on
    pytest.param(5e-5, id="small-offset"),
])
def test_a_wrong_value_beside_the_kink_is_not_passed(wrong):
    forward, backward, params, inputs = _greenhouses(wrong=wrong)
    # The slope of the heater once on, past its kink 1e-2 to the left (mpmath): what the
    # first wrong value copies.
    left = _mp_reading_gradient(params, inputs, shift=-1e-2)[0]
    assert left == pytest.approx(0.0011115, rel=1e-3)
    report = probe(forward, backward, params, inputs, seed=0)
    detail = next(d for d in report.tensor("reading").details if tuple(d.index) == (0,))
    assert str(getattr(detail.status, "value", detail.status)) in ("fail", "inconclusive")


# A second scenario: irrigation valves whose settings pay a Huber penalty on their distance from
# a target, steep (u = a (v - k), a ~ -90): the quadratic piece |u| <= 1 is ~0.02 wide, and
# the first valve sits 1.1e-3 inside its corner (f'' jumps there, f' does not). Every wide
# step crosses the corner; below it the loss is quadratic along the valve, where a central
# quotient is exact (truncation 0, common practice), and rounding alone remains.
VALVE = np.array([[0.036485247, 0.008959815, 0.009984119], [0.023421833, -0.004365806, -0.008757290],
                  [-0.008562819, -0.006278436, 0.008102605]], dtype=np.float32)
VALVE_INPUTS = {
    "a": np.array([[-92.047844, -59.942806, -79.255806], [-70.747627, -35.846722, -93.829437],
                   [-92.282265, -74.354782, -57.128387]], dtype=np.float32),
    "k": np.array([[0.026786478, 0.0029745286, 0.002364842], [0.01106877, -0.065827131, -0.026006613],
                   [0.0049820296, -0.01972747, -0.01233178]], dtype=np.float32),
    "w": np.array([[0.95367175, 0.069758385, 0.82512939], [0.46118101, -0.89590633, 0.48737401],
                   [-0.65534967, -0.20075427, -0.62798476]], dtype=np.float32)}
VALVE_SCALE = 0.6802129745483398


def _valves(factor: float = 1.0):
    def forward(p, i):
        u = i["a"] * (p["valve"] - i["k"])
        return np.float32(VALVE_SCALE * np.sum(i["w"] * np.where(np.abs(u) <= 1, 0.5 * u * u, np.abs(u) - 0.5)))

    def backward(p, i):
        u = i["a"] * (p["valve"] - i["k"])
        g = np.asarray(VALVE_SCALE * i["w"] * np.clip(u, -1, 1) * i["a"], dtype=np.float32).copy()
        g[0, 0] *= np.float32(factor)
        return {"valve": g}

    return forward, backward, {"valve": VALVE}, VALVE_INPUTS


def test_the_valve_scenario_is_what_it_says():
    forward, backward, params, inputs = _valves()
    u0 = float(inputs["a"][0, 0]) * (float(VALVE[0, 0]) - float(inputs["k"][0, 0]))
    corner = (1.0 + u0) / abs(float(inputs["a"][0, 0]))  # distance to u = -1 along the valve
    assert -1.0 < u0 < 0.0 and 1e-3 < corner < 1.2e-3
    mp = lambda v: mpmath.mpf(float(v))  # noqa: E731
    a, k, w = mp(inputs["a"][0, 0]), mp(inputs["k"][0, 0]), mp(inputs["w"][0, 0])

    def loss(v):  # the first valve's term (the others do not move with it)
        u = a * (v - k)
        return mpmath.mpf(VALVE_SCALE) * w * (u * u / 2 if abs(u) <= 1 else abs(u) - mpmath.mpf(0.5))

    with mpmath.workdps(40):
        exact = float(mpmath.diff(loss, mp(VALVE[0, 0])))
    assert backward(params, inputs)["valve"][0, 0] == pytest.approx(exact, rel=1e-6)


def test_a_valve_inside_its_corner_passes():
    report = probe(*_valves(), seed=0)
    assert report.tensor("valve").status == "pass", [d.reason for d in report.tensor("valve").details]


@pytest.mark.parametrize("factor", [1.006, 0.99, 1.1])
def test_a_wrong_valve_gradient_fails(factor):
    report = probe(*_valves(factor), seed=0)
    detail = next(d for d in report.tensor("valve").details if tuple(d.index) == (0, 0))
    assert str(getattr(detail.status, "value", detail.status)) == "fail"
