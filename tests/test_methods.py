"""Extrapolation, the complex step, re-checks of suspects, inconclusive verdicts, float32.

References: mpmath.diff at 50 digits; the complex-step derivative Im f(x + ih)/h (Squire &
Trapp, SIAM Review 40(1), 1998); Ridders' tableau (Advances in Engineering Software 4(2), 1982).
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe
from test_numerics_reference import POINTS, SMOOTH

from gradprobe import probe
from gradprobe.engine.richardson import DEFAULT_START as RICHARDSON_START
from gradprobe.engine.refine import climb
from gradprobe.common.errors import ComplexStepError

mpmath.mp.dps = 50


def _reference(mp_fn, t):
    return float(mpmath.diff(mp_fn, mpmath.mpf(float(t))))


@pytest.mark.parametrize("name", sorted(SMOOTH))
def test_three_rows_reach_1e_10_of_mpmath_and_the_bound_holds(name):
    """The richardson method's ladder: steps 2**-7 max(1, |x|), halved twice (6 calls)."""
    fn, mp_fn = SMOOTH[name]
    probe = make_probe(lambda w: np.sum(fn(w)), POINTS)
    flat = np.arange(POINTS.size)
    before = probe.evaluator.count
    ladder = climb(probe, flat, RICHARDSON_START * np.maximum(1.0, np.abs(POINTS)), 3)
    ref = np.array([_reference(mp_fn, t) for t in POINTS])
    error = np.abs(ladder.central.value - ref)
    assert np.all(error <= 1e-10 * np.abs(ref)), error / np.abs(ref)
    assert np.all(error <= ladder.central.error)  # the bound holds
    assert probe.evaluator.count - before == 6 * POINTS.size


@pytest.mark.parametrize("name", sorted(SMOOTH))
def test_complex_step_within_1e_14_of_mpmath(name):
    fn, mp_fn = SMOOTH[name]
    ref = np.array([_reference(mp_fn, t) for t in POINTS])
    report = probe(lambda p, i: np.sum(fn(p["w"])), lambda p, i: {"w": ref}, {"w": POINTS.copy()},
                   method="complex")
    t = report.tensor("w")
    assert report.ok and t.max_rel_error < 1e-14
    assert report.evaluations <= POINTS.size + 8  # one evaluation per coordinate


def test_complex_step_refuses_a_forward_that_drops_the_imaginary_part():
    with pytest.raises(ComplexStepError, match="drops the imaginary part"):
        probe(lambda p, i: float(np.real(np.sum(np.sin(p["w"])))), lambda p, i: {"w": np.cos(p["w"])},
              {"w": POINTS.copy()}, method="complex")


def test_complex_step_refuses_a_forward_that_raises_on_complex_values():
    with pytest.raises(ComplexStepError, match="cannot take complex inputs"):
        probe(lambda p, i: np.sum(np.logaddexp(0.0, p["w"])),  # logaddexp has no complex loop
              lambda p, i: {"w": 1 / (1 + np.exp(-p["w"]))},
              {"w": POINTS[:3].copy()}, method="complex")


def test_richardson_method_everywhere():
    w = np.linspace(-1, 1, 7)
    report = probe(lambda p, i: float(np.sum(np.sin(3 * p["w"]))), lambda p, i: {"w": 3 * np.cos(3 * p["w"])},
                   {"w": w}, method="richardson")
    assert report.ok and report.method == "richardson"
    assert report.tensor("w").max_rel_error < 1e-10


def test_suspects_are_rechecked_before_failing():
    """sin(1000 w): the plain central difference's truncation error (h**2 1000**2 / 6 ~ 6e-6
    relative) exceeds 1e-6; extrapolation clears it. Without the re-check the first pair's
    bound (rounding only) cannot fail it either: a short ladder checks the truncation, and
    the correct gradient is not failed; a gradient 1% off still is."""
    w = np.linspace(0.1, 0.9, 9)

    def forward(p, i):
        return float(np.sum(np.sin(1000 * p["w"])))

    def backward(p, i):
        return {"w": 1000 * np.cos(1000 * p["w"])}

    rechecked = probe(forward, backward, {"w": w})
    assert rechecked.ok
    plain = probe(forward, backward, {"w": w}, recheck=False)
    assert plain.ok and plain.tensor("w").failed == 0
    wrong = probe(forward, lambda p, i: {"w": 1.01 * backward(p, i)["w"]}, {"w": w}, recheck=False)
    assert not wrong.ok


def test_rounding_noise_is_beaten_with_larger_steps_where_the_loss_allows():
    """A loss of 1e7 + sum(w**2): at the usual step rounding swamps a 1e-6 comparison;
    the loss is smooth on the scale of the params, so steps up to that scale resolve it."""
    w = np.array([0.3, -0.8, 1.1])

    def forward(p, i):
        return float(1e7 + np.sum(p["w"] ** 2))

    report = probe(forward, lambda p, i: {"w": 2 * p["w"]}, {"w": w})
    assert report.ok and report.tensor("w").status == "pass"
    assert not probe(forward, lambda p, i: {"w": 3 * p["w"]}, {"w": w}).ok


def test_noise_that_no_step_beats_is_inconclusive_with_its_reason():
    """1e12 + sum(sin(w)): the loss bends on a scale of 1, so steps cannot grow past it,
    and there the rounding of 1e12 (about 1e-4 per value) is far above 1e-6."""
    w = np.array([0.3, -0.8, 1.1])

    def forward(p, i):
        return float(1e12 + np.sum(np.sin(p["w"])))

    report = probe(forward, lambda p, i: {"w": np.cos(p["w"])}, {"w": w})
    t = report.tensor("w")
    assert report.ok and t.status == "inconclusive" and t.inconclusive == 3
    assert t.inconclusive_reason == (
        "rounding noise in the loss is above the threshold at every step tried"
    )
    assert all(d.reason == t.inconclusive_reason for d in t.details)
    wrong = probe(forward, lambda p, i: {"w": -np.cos(p["w"])}, {"w": w})
    assert not wrong.ok  # a real error is still caught through the noise


def test_float32_inside_a_float64_forward_is_noticed():
    w = np.linspace(0.2, 1.2, 6)

    def forward(p, i):
        return float(np.sum(np.tanh(p["w"].astype(np.float32) * np.float32(1.5))))

    def backward(p, i):
        return {"w": 1.5 * (1 - np.tanh(1.5 * p["w"]) ** 2)}

    report = probe(forward, backward, {"w": w})
    # 2 sqrt(u) = 2**-11 to two digits, u = 2**-24 (IEEE 754 binary32)
    assert report.compute_dtype == "float32" and report.threshold == 4.9e-4
    assert any("although its params are float64" in n for n in report.notes)
    assert report.ok
    assert not probe(forward, lambda p, i: {"w": 1.1 * backward(p, i)["w"]}, {"w": w}).ok


def test_float64_forward_is_not_mistaken_for_float32():
    w = np.linspace(0.2, 1.2, 6)
    report = probe(lambda p, i: float(np.sum(np.tanh(p["w"]))), lambda p, i: {"w": 1 - np.tanh(p["w"]) ** 2}, {"w": w})
    assert report.compute_dtype == "float64" and report.threshold == 1e-6 and not report.notes


def test_correct_float32_layer_passes_and_a_ten_percent_bug_fails():
    rng = np.random.default_rng(2)
    W = rng.normal(size=(5, 3)).astype(np.float32)
    x = rng.normal(size=(20, 5)).astype(np.float32)

    def forward(p, i):
        return np.sum(np.tanh(i["x"] @ p["W"]) ** 2)

    def backward(p, i, factor=1.0):
        t = np.tanh(i["x"] @ p["W"])
        return {"W": factor * (i["x"].T @ (2 * t * (1 - t**2)))}

    good = probe(forward, backward, {"W": W}, {"x": x})
    assert good.ok and good.compute_dtype == "float32"
    bad = probe(forward, lambda p, i: backward(p, i, 1.1), {"W": W}, {"x": x})
    assert not bad.ok and bad.tensor("W").failed == W.size


def test_float32_params_with_a_python_float_loss_are_judged_as_float32():
    """float(np.sum(...)) of float32 arithmetic is a float64 result with float32 noise."""
    rng = np.random.default_rng(2)
    W = rng.normal(size=(5, 3)).astype(np.float32)
    x = rng.normal(size=(20, 5)).astype(np.float32)

    def forward(p, i):
        return float(np.sum(np.tanh(i["x"] @ p["W"]) ** 2))

    def backward(p, i, factor=1.0):
        t = np.tanh(i["x"] @ p["W"])
        return {"W": factor * (i["x"].T @ (2 * t * (1 - t**2)))}

    good = probe(forward, backward, {"W": W}, {"x": x})
    assert good.ok and good.compute_dtype == "float32"
    assert any("its params are float32, though it returns float64" in n for n in good.notes)
    assert not probe(forward, lambda p, i: backward(p, i, 1.1), {"W": W}, {"x": x}).ok
