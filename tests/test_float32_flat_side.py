"""float32 code whose loss is cast to float32 (no float64 run), with a ReLU unit switched off
just beside its kink: the loss keeps its value bit for bit on the off side, far beyond the
param's scale, while on the other side the kink lies 0.02 away, within every step wide
enough to beat rounding.

Scenario: irrigation valves. Each valve's flow is max(0, gain * (pressure - opening)), the
season's water cost a weighted sum of flows times a price; one valve sits 0.02 bar short of
opening (closed), another far from it, the rest are open. References outside the project: d/du max(0, u) = 0 for
u < 0 and 1 for u > 0 (any table of derivatives, from memory), so the pressure gradient is
price * weight * gain on an open valve and exactly 0 on the closed one; each value is also
checked against mpmath's high-precision differentiation (mpmath.diff at 40 digits) of the
same loss at the float32 values.
"""

from __future__ import annotations

import mpmath
import numpy as np

from gradprobe import probe

mpmath.mp.dps = 40

PRICE = np.float32(25.7)
CLOSED = 0  # the valve 0.02 bar short of opening


def _valves(closed_gradient: float = 0.0, open_factor: float = 1.0, wrong: int = 1):
    """The target (forward, backward, params, inputs); ``closed_gradient`` is what backward
    gives the closed valve (0: correct), ``open_factor`` scales the gradient of open valve
    ``wrong`` (1: correct)."""
    params = {"pressure": np.array([-21.5, 37.2, 9.68, -23.9, 11.4], dtype=np.float32)}
    gain = np.array([-0.027, -0.066, -0.063, -0.024, -0.050], dtype=np.float32)
    short = np.array([0.0218, -12.8, -9.35, 56.2, -8.79], dtype=np.float32)  # pressure - opening
    inputs = {"gain": gain, "opening": (params["pressure"] - short).astype(np.float32),
              "weight": np.array([0.212, -0.715, 0.639, 0.209, -0.979], dtype=np.float32)}

    def forward(p, i):
        u = i["gain"] * (p["pressure"] - i["opening"])
        return np.float32(PRICE * np.sum(i["weight"] * np.maximum(u, np.float32(0))))

    def backward(p, i):
        u = i["gain"] * (p["pressure"] - i["opening"])
        g = (PRICE * i["weight"] * i["gain"] * (u > 0)).astype(np.float32)
        g[CLOSED] = np.float32(closed_gradient)
        g[wrong] *= np.float32(open_factor)
        return {"pressure": g}

    return forward, backward, params, inputs


def _mp_gradient(params, inputs) -> np.ndarray:
    """The exact gradient at the float32 values, by mpmath.diff of the loss in 40 digits (each
    valve's flow is its own summand: differentiated where it is smooth, at the point)."""
    mp = lambda a: [mpmath.mpf(float(v)) for v in np.ravel(a)]  # noqa: E731
    p, g, o, w = mp(params["pressure"]), mp(inputs["gain"]), mp(inputs["opening"]), mp(inputs["weight"])
    price = mpmath.mpf(float(PRICE))

    def flow(k, v):
        return price * w[k] * mpmath.mpf(max(0, g[k] * (v - o[k])))

    return np.array([float(mpmath.diff(lambda v, k=k: flow(k, v), p[k])) for k in range(len(p))])


def _status(report) -> str:
    return str(getattr(report.tensor("pressure").status, "value", report.tensor("pressure").status))


def test_the_scenario_is_what_it_says():
    forward, backward, params, inputs = _valves()
    u = inputs["gain"].astype(np.float64) * (params["pressure"].astype(np.float64) - inputs["opening"])
    assert u[CLOSED] < 0 and inputs["gain"][CLOSED] < 0  # closed, and stays closed for every rise
    assert u[3] < -1 and np.count_nonzero(u > 0) == 3  # valve 3 far from opening, the rest open
    exact = _mp_gradient(params, inputs)
    closed_form = PRICE * inputs["weight"].astype(np.float64) * inputs["gain"] * (u > 0)
    assert np.allclose(exact, closed_form, rtol=1e-6, atol=0)
    assert np.allclose(backward(params, inputs)["pressure"], exact, rtol=1e-6, atol=0)
    assert exact[CLOSED] == 0.0
    assert isinstance(forward(params, inputs), np.float32)  # no float64 run is possible


def test_the_correct_gradient_passes_on_the_closed_valves_level_side():
    """Once inconclusive ("the loss kept its value at the point at every point measured on
    one side"): the level side, flat far beyond the param's scale, bounds f' within the
    threshold."""
    report = probe(*_valves())
    assert _status(report) == "pass", [(d.index, d.reason) for d in report.tensor("pressure").details]


def test_an_open_valve_half_a_percent_off_still_fails_and_is_located():
    report = probe(*_valves(open_factor=1.005, wrong=1))
    t = report.tensor("pressure")
    assert _status(report) == "fail"
    assert (1,) in [tuple(int(i) for i in b) for b in t.bad_indices] or tuple(int(i) for i in t.worst_index) == (1,)


def test_a_closed_valve_given_a_gradient_never_passes():
    """The closed valve's true gradient is exactly 0 (mpmath, the table); backward gives it
    half a percent of the open valves' typical gradient (relative error 1 on it): the level
    side's quotients, all 0, must not pass it."""
    forward, backward, params, inputs = _valves()
    typical = float(np.sqrt(np.mean(_mp_gradient(params, inputs) ** 2)))
    report = probe(*_valves(closed_gradient=0.005 * typical))
    assert _status(report) in ("fail", "inconclusive")
    assert any(tuple(int(i) for i in d.index) == (CLOSED,) and str(getattr(d.status, "value", d.status)) != "pass"
               for d in report.tensor("pressure").details)
