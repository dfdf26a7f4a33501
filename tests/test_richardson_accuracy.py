"""--method richardson: accuracy and evaluations on a dense tanh layer with a closed-form gradient.

Reference: the chain rule through tanh with d/dz tanh z = sech**2 z = 1 - tanh**2 z
(Abramowitz & Stegun, Handbook of Mathematical Functions, 4.5.82), evaluated in mpmath at
40 digits, so the reference carries no rounding of its own at the 1e-11 checked here.

The target: soil moisture forecast from 6 sensor readings at 40 field plots, 24 tanh units
and a linear read-out, mean squared error. Along each read-out weight the loss is quadratic
(two rows of steps settle it); along each hidden weight it bends.
"""

from __future__ import annotations

import mpmath
import numpy as np

from gradprobe import probe

PLOTS, SENSORS, UNITS = 40, 6, 24


def _setup():
    rng = np.random.default_rng(11)
    params = {"W": 0.5 * rng.normal(size=(SENSORS, UNITS)) / np.sqrt(SENSORS),
              "v": rng.normal(size=UNITS) / np.sqrt(UNITS)}
    inputs = {"readings": rng.normal(size=(PLOTS, SENSORS)), "moisture": rng.normal(size=PLOTS)}
    return params, inputs


def forward(p, i):
    return float(np.mean((np.tanh(i["readings"] @ p["W"]) @ p["v"] - i["moisture"]) ** 2))


def backward(p, i):
    h = np.tanh(i["readings"] @ p["W"])
    r = 2.0 * (h @ p["v"] - i["moisture"]) / PLOTS
    return {"W": i["readings"].T @ (np.outer(r, p["v"]) * (1.0 - h**2)), "v": h.T @ r}


def _reference(p, i):
    """The same chain rule at 40 digits (A&S 4.5.82 for the tanh)."""
    with mpmath.workdps(40):
        x = [[mpmath.mpf(float(t)) for t in row] for row in i["readings"]]
        w = [[mpmath.mpf(float(t)) for t in row] for row in p["W"]]
        v = [mpmath.mpf(float(t)) for t in p["v"]]
        gw = [[mpmath.mpf(0)] * UNITS for _ in range(SENSORS)]
        gv = [mpmath.mpf(0)] * UNITS
        for n in range(PLOTS):
            h = [mpmath.tanh(mpmath.fsum(x[n][s] * w[s][j] for s in range(SENSORS))) for j in range(UNITS)]
            r = 2 * (mpmath.fsum(h[j] * v[j] for j in range(UNITS)) - mpmath.mpf(float(i["moisture"][n]))) / PLOTS
            for j in range(UNITS):
                gv[j] += h[j] * r
                dz = r * v[j] * (1 - h[j] ** 2)  # sech**2 = 1 - tanh**2, A&S 4.5.82
                for s in range(SENSORS):
                    gw[s][j] += x[n][s] * dz
        return {"W": np.array([[float(t) for t in row] for row in gw]), "v": np.array([float(t) for t in gv])}


def test_richardson_reaches_1e_11_of_the_closed_form_at_6_evaluations_per_coordinate():
    params, inputs = _setup()
    exact = _reference(params, inputs)
    report = probe(forward, backward, params, inputs, method="richardson")
    assert report.ok
    coordinates = sum(t.size for t in report.tensors)
    assert report.evaluations <= 6 * coordinates, report.evaluations / coordinates
    for name in ("W", "v"):
        t = report.tensor(name)
        g = exact[name].reshape(-1)[t.coordinates.flat]
        err = np.abs(np.asarray(t.coordinates.numeric) - g)
        # relative to the gradient's size: the coordinate's, or its tensor's rms where smaller
        scale = np.maximum(np.abs(g), np.sqrt(np.mean(exact[name] ** 2)))
        assert np.max(err / scale) <= 1e-11, (name, np.max(err / scale))
        assert np.all(err <= np.asarray(t.coordinates.noise) * np.asarray(t.coordinates.scale))  # bounds hold
    # Along a read-out weight the loss is quadratic: two rows (4 calls) settle every one.
    assert report.tensor("v").evaluations == 4 * UNITS


def test_two_rows_do_not_settle_a_kink_at_the_point():
    """|w - c| at w = c: central quotients agree at every step (both 0), but the one-sided
    quotients stay 2 apart instead of halving with the step, so the coordinate is not settled
    on two rows: it is a kink (the subgradient 0, numpy's sign there, lies between the sides -1
    and 1)."""
    c = np.linspace(-0.4, 0.6, 5)
    report = probe(lambda p, i: float(np.sum(np.abs(p["w"] - c))), lambda p, i: {"w": np.sign(p["w"] - c)},
                   {"w": c.copy()}, method="richardson")
    t = report.tensor("w")
    assert t.status == "kink" and t.kinks == 5, (t.status, t.kinks)
