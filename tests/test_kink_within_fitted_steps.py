"""float32 code whose loss is cast to float32 (no float64 run), with an absolute-error term
whose kink lies about 2e-5 from the point: every step wide enough to beat the loss's rounding
crosses it.

Scenario: calibrating four rain gauges. Each gauge's offset is fitted to a reference reading;
the cost is price * sum(weight * |gain * (offset - reading)|) in float32. One gauge's offset
sits 1.7e-5 to 2.1e-5 from its reading. Central quotients at steps beyond that distance see
only gain * (offset - reading) / step of the kink's slope (about 0 once the step is wide),
so a curve fitted to them reads the gauge's derivative as ~0 while the true one is
price * weight * gain * sign(offset - reading) (d|u|/du = sign(u) for u != 0, from any table
of derivatives, from memory). Each gradient is also checked against mpmath's high-precision
differentiation (mpmath.diff at 40 digits) of the same loss at the float32 values.

Once the false alarm "fail" on the near gauge (a correct backward, the adversarial
generator's float32only-410 in another setting); now it passes, and a bug on another gauge
is located there alone.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.engine.smooth_across import unseen_kink

mpmath.mp.dps = 40

PRICE = np.float32(12.25)
NEAR = 1  # the gauge whose offset lies beside its reading
# (distance offset - reading, weight, gain) of the near gauge: settings that each failed
CASES = [(-2.0712614e-05, 0.0418, -4.79), (-2.0883795811710008e-05, -0.16716010288930128, -2.458726028760142),
         (1.7043588244822474e-05, 0.039020883888764235, -4.117370827126681),
         (1.9156294883314172e-05, -0.021979918420431233, -1.2373857247084752),
         (2.3217014625847603e-05, 0.09066999307202628, -4.194041331376516)]


def _gauges(distance: float, weight: float, gain: float, factor: float = 1.0, wrong: int = NEAR):
    """The target (forward, backward, params, inputs); backward's gradient of gauge ``wrong``
    scaled by ``factor`` (1: correct)."""
    params = {"offset": np.array([0.0275, -0.3718, -0.1743, -0.0340], dtype=np.float32)}
    reading = np.array([0.2368, -0.3718 + distance, -0.1257, -0.1332], dtype=np.float32)
    inputs = {"gain": np.array([-5.55, gain, -2.44, -3.26], dtype=np.float32), "reading": reading,
              "weight": np.array([-0.929, weight, -0.0599, -0.682], dtype=np.float32)}

    def forward(p, i):
        u = i["gain"] * (p["offset"] - i["reading"])
        return np.float32(PRICE * np.sum(i["weight"] * np.abs(u)))

    def backward(p, i):
        u = i["gain"] * (p["offset"] - i["reading"])
        g = (PRICE * i["weight"] * np.sign(u) * i["gain"]).astype(np.float32)
        g[wrong] *= np.float32(factor)
        return {"offset": g}

    return forward, backward, params, inputs


def _mp_gradient(params, inputs) -> np.ndarray:
    """The exact gradient at the float32 values: mpmath.diff of each gauge's term in 40 digits."""
    mp = lambda a: [mpmath.mpf(float(v)) for v in np.ravel(a)]  # noqa: E731
    p, g, r, w = mp(params["offset"]), mp(inputs["gain"]), mp(inputs["reading"]), mp(inputs["weight"])
    price = mpmath.mpf(float(PRICE))
    return np.array([float(mpmath.diff(lambda v, k=k: price * w[k] * abs(g[k] * (v - r[k])), p[k]))
                     for k in range(len(p))])


def _status(report) -> tuple[str, list[tuple[int, ...]]]:
    t = report.tensor("offset")
    flagged = [tuple(int(i) for i in d.index) for d in t.details if str(getattr(d.status, "value", d.status)) == "fail"]
    return str(getattr(t.status, "value", t.status)), flagged


@pytest.mark.parametrize("case", CASES)
def test_the_scenario_is_what_it_says(case):
    forward, backward, params, inputs = _gauges(*case)
    apart = params["offset"].astype(np.float64) - inputs["reading"]
    assert 1.5e-5 < abs(apart[NEAR]) < 2.5e-5 and np.all(np.abs(np.delete(apart, NEAR)) > 0.04)
    exact = _mp_gradient(params, inputs)
    closed_form = PRICE * inputs["weight"].astype(np.float64) * inputs["gain"] * np.sign(inputs["gain"] * apart)
    assert np.allclose(exact, closed_form, rtol=1e-6, atol=0)
    assert np.allclose(backward(params, inputs)["offset"], exact, rtol=1e-6, atol=0)
    assert isinstance(forward(params, inputs), np.float32)  # no float64 run is possible


@pytest.mark.parametrize("case", CASES)
def test_the_correct_gradient_is_not_failed_beside_the_kink(case):
    status, flagged = _status(probe(*_gauges(*case)))
    assert status in ("pass", "kink"), flagged


@pytest.mark.parametrize("case", CASES[:2])
@pytest.mark.parametrize("wrong", [0, 3])
def test_a_far_gauge_half_a_percent_off_fails_and_is_located_alone(case, wrong):
    status, flagged = _status(probe(*_gauges(*case, factor=1.005, wrong=wrong)))
    assert status == "fail" and flagged == [(wrong,)]


def test_the_near_gauge_given_the_other_sides_slope_fails():
    """backward gives the near gauge the one-sided derivative of the far side of its kink
    (sign flipped): a kink could give it only at the kink itself, 2e-5 away."""
    status, flagged = _status(probe(*_gauges(*CASES[0], factor=-1.0)))
    assert status == "fail" and flagged == [(NEAR,)]


def _even(f, x: float, steps: np.ndarray) -> np.ndarray:
    return 0.5 * (f(x + steps) + f(x - steps)) - f(x)


def test_the_even_part_shows_a_kink_nearer_than_every_step():
    """E(s) = (f(x+s) + f(x-s)) / 2 - f(x) of c |y - k| + a smooth part, |x - k| = 2e-5 below
    steps from 0.03 to 0.25: E gains c (s - |x - k|) (closed form), a term in s no smooth
    loss has. With rounding 1e-6 per value the check must see it; on the smooth part alone
    (cos, whose even part -cos(x) (1 - cos s) has only even powers: Taylor series) it must not,
    and the unseen jump it allows is of the rounding's size over the steps."""
    steps = np.linspace(0.25 / 8, 0.25, 64)
    sigma = 1e-6
    noise = np.random.default_rng(5).normal(0.0, sigma, (2, steps.size)).mean(axis=0)  # two roundings, halved
    smooth = lambda y: 0.7 * np.cos(3.0 * y) + 0.2 * y  # noqa: E731
    kinked = lambda y: smooth(y) + 2.45 * np.abs(y - (-0.3718 + 2.07e-5))  # noqa: E731
    assert unseen_kink(_even(kinked, -0.3718, steps) + noise, steps, sigma, 2.0) is None
    jump = unseen_kink(_even(smooth, -0.3718, steps) + noise, steps, sigma, 2.0)
    assert jump is not None and jump < 100 * sigma / 0.25
    # a kink whose jump is far above that bound shows; one far below it may not
    weak = lambda y: smooth(y) + 1e-7 * np.abs(y - (-0.3718 + 2.07e-5))  # noqa: E731
    assert unseen_kink(_even(weak, -0.3718, steps) + noise, steps, sigma, 2.0) is not None
