"""float32 and float16 code judged on a model of its dtype's unit roundoff.

Targets: a tanh layer of sensor readings fitted by a sum of squared residuals, written in
float32 or float16 with the loss cast to the narrow type (so no float64 run is possible),
with its bias gradient exact or too large by a few percent; and a float32 model of shop
demand whose ``np.log`` is undefined a large step away from the point.

References outside the project: each correct backward is checked against mpmath's
high-precision differentiation (mpmath.diff at 40 digits) of the same loss evaluated exactly
at the narrow values, and the tanh derivative d/dz tanh z = sech^2 z is Abramowitz & Stegun
4.5.82 (from memory).
"""

from __future__ import annotations

import warnings

import mpmath
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.settings.options import default_threshold

mpmath.mp.dps = 40


def _sensor_layer(dtype, bias_factor=1.0, cast=True, rows=40, seed=3):
    """Readings x (rows, 3) mapped by tanh(x W + b) onto targets y; loss sum of squares, cast
    to ``dtype`` when ``cast`` (then no float64 run is possible; else the code runs in
    whatever type it is given). The bias gradient is scaled by ``bias_factor`` (1: correct)."""
    rng = np.random.default_rng(seed)
    w = 0.4 * rng.normal(size=3)
    params = {"layer": {"W": (w + 0.05 * rng.normal(size=3)).astype(dtype),
                        "b": np.array([0.2], dtype=dtype)}}
    x = rng.normal(size=(rows, 3))
    fitted = np.tanh(x @ w + 0.1)  # readings near a fit, not at it
    inputs = {"x": x.astype(dtype), "y": (fitted + 0.15 * rng.normal(size=rows)).astype(dtype)}

    def forward(p, i):
        z = i["x"] @ p["layer"]["W"] + p["layer"]["b"][0]
        r = np.tanh(z) - i["y"]
        loss = np.sum(r * r)
        return dtype(loss) if cast else loss

    def backward(p, i):
        z = i["x"] @ p["layer"]["W"] + p["layer"]["b"][0]
        t = np.tanh(z)
        dz = 2 * (t - i["y"]) * (1 - t * t)  # sech^2 z = 1 - tanh^2 z (A&S 4.5.82)
        return {"layer": {"W": i["x"].T @ dz,
                          "b": np.sum(dz, keepdims=True) * bias_factor}}

    return forward, backward, params, inputs


def _mp_bias_gradient(params, inputs):
    """d loss / d b at the narrow values, by mpmath.diff of the loss in 40 digits."""
    x = [[mpmath.mpf(float(v)) for v in row] for row in inputs["x"]]
    y = [mpmath.mpf(float(v)) for v in inputs["y"]]
    w = [mpmath.mpf(float(v)) for v in params["layer"]["W"]]

    def loss(b):
        return sum((mpmath.tanh(sum(xi * wi for xi, wi in zip(row, w)) + b) - yi) ** 2
                   for row, yi in zip(x, y))

    return float(mpmath.diff(loss, mpmath.mpf(float(params["layer"]["b"][0]))))


@pytest.mark.parametrize("dtype", [np.float32, np.float16])
def test_correct_backward_matches_mpmath(dtype):
    """The correct backward of the narrow layer is within the dtype's rounding of mpmath's
    derivative (so the targets below are what they claim to be)."""
    forward, backward, params, inputs = _sensor_layer(dtype)
    ours = float(backward(params, inputs)["layer"]["b"][0])
    exact = _mp_bias_gradient(params, inputs)
    assert abs(ours - exact) <= 200 * np.finfo(dtype).eps * max(abs(exact), 1.0)


# float32 with its loss cast: judged on float32 arithmetic alone. float16 without a cast: the
# code also runs in float64, the float64 run is the reference.
LAYERS = [(np.float32, True), (np.float16, False)]


@pytest.mark.parametrize(("dtype", "cast"), LAYERS)
def test_correct_narrow_layer_passes(dtype, cast):
    forward, backward, params, inputs = _sensor_layer(dtype, cast=cast)
    report = probe(forward, backward, params, inputs)
    assert report.ok
    assert {t.status for t in report.tensors} <= {"pass", "kink"}, report.tensors


@pytest.mark.parametrize(("dtype", "cast", "factor"), [(np.float32, True, 1.008), (np.float32, True, 1.005),
                                                       (np.float16, False, 1.1), (np.float16, False, 1.05)])
def test_narrow_bias_error_fails(dtype, cast, factor):
    """A bias gradient too large by a share the dtype's arithmetic resolves fails: float32
    with its loss cast to float32 (no wider run exists), float16 through its float64 run."""
    forward, backward, params, inputs = _sensor_layer(dtype, factor, cast)
    report = probe(forward, backward, params, inputs)
    assert report.tensor("layer.b").status == "fail", report.tensor("layer.b")
    assert report.tensor("layer.W").status in ("pass", "kink")


@pytest.mark.parametrize("factor", [1.0, 1.1])
def test_float16_alone_never_passes_a_bug_or_fails_correct_code(factor):
    """float16 with its loss cast to float16 (a loss of 0.7 rounds at 2.4e-4, and central
    differences resolve a few percent at best): the correct layer does not fail, and the 10%
    error does not pass."""
    forward, backward, params, inputs = _sensor_layer(np.float16, factor, cast=True)
    status = probe(forward, backward, params, inputs).tensor("layer.b").status
    assert status != ("fail" if factor == 1.0 else "pass")


def test_bias_error_share_matches_mpmath():
    """The planted errors are the shares the tests name, measured against mpmath."""
    for dtype, factor in [(np.float32, 1.008), (np.float16, 1.05)]:
        forward, backward, params, inputs = _sensor_layer(dtype, factor, cast=False)
        exact = _mp_bias_gradient(params, inputs)
        ours = float(backward(params, inputs)["layer"]["b"][0])
        assert abs(ours / exact - factor) < 0.01 * (factor - 1.0) + 50 * np.finfo(dtype).eps


def test_thresholds_follow_unit_roundoff():
    """Narrower types get wider default thresholds, each well below the errors above, and
    float64 keeps its 1e-6 (common practice)."""
    assert default_threshold(np.float64) == 1e-6
    assert default_threshold(np.float32) < 0.005 / 4
    assert default_threshold(np.float16) < 0.05
    assert default_threshold(np.float64) < default_threshold(np.float32) < default_threshold(np.float16)


def _shop_demand(bias_factor=1.0):
    """Demand for 12 shop items: rate = exp(x w) * s with a small positive scale s; Poisson
    loss sum(rate - y log rate). ``np.log(s)`` is undefined for a move of s by 5e-3, which is
    float32's first central-difference step at |s| <= 1."""
    rng = np.random.default_rng(11)
    params = {"w": (0.3 * rng.normal(size=2)).astype(np.float32),
              "s": np.array([2e-3], dtype=np.float32)}
    inputs = {"x": rng.normal(size=(12, 2)).astype(np.float32),
              "y": rng.integers(0, 3, size=12).astype(np.float32)}

    def forward(p, i):
        log_rate = i["x"] @ p["w"] + np.log(p["s"][0])
        return np.float32(np.sum(np.exp(log_rate) - i["y"] * log_rate))

    def backward(p, i):
        log_rate = i["x"] @ p["w"] + np.log(p["s"][0])
        d = np.exp(log_rate) - i["y"]
        return {"w": i["x"].T @ d, "s": np.array([np.sum(d) / p["s"][0] * bias_factor], dtype=np.float32)}

    return forward, backward, params, inputs


def test_moved_points_outside_the_domain_print_no_warning(recwarn, capsys):
    """A step that takes np.log outside its domain is shrunk, not shown to the user: no
    RuntimeWarning reaches the console or the warnings log, and the correct code passes."""
    forward, backward, params, inputs = _shop_demand()
    with warnings.catch_warnings():
        warnings.simplefilter("always")  # nothing may rely on a warning having been seen
        report = probe(forward, backward, params, inputs)
    captured = capsys.readouterr()
    assert "RuntimeWarning" not in captured.out + captured.err
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]
    assert report.ok and {t.status for t in report.tensors} <= {"pass", "kink"}, report.tensors


def test_moved_points_outside_the_domain_still_catch_a_bug():
    """The same model with d/ds 2% too large fails (d/ds log s = 1/s, A&S 4.1.7? no: the
    derivative of log is 1/s, Abramowitz & Stegun 4.1.49 from memory)."""
    forward, backward, params, inputs = _shop_demand(1.02)
    report = probe(forward, backward, params, inputs)
    assert report.tensor("s").status == "fail"


@pytest.mark.parametrize(("dtype", "factor"), [(np.float32, 1.005), (np.float16, 1.25)])
def test_a_bug_only_in_the_narrow_type_fails_where_its_arithmetic_resolves_it(dtype, factor):
    """Code that also runs in float64 but is wrong only in its narrow type (a branch on the
    dtype): the narrow gradient leaves its float64 run by clearly more than the rounding
    measured on the target (float16 values of these readings move the bias gradient by about
    2% when rounded) and is judged on the narrow code itself: float32 arithmetic resolves
    0.5% there and fails it; float16 arithmetic does not resolve even 25% of a loss of 0.7
    (it rounds at 2.4e-4), so that is undecided, never a pass."""
    forward, backward, params, inputs = _sensor_layer(dtype, cast=False)

    def narrow_only(p, i):
        g = backward(p, i)
        b = g["layer"]["b"]
        return {"layer": {"W": g["layer"]["W"], "b": b * factor if b.dtype == dtype else b}}

    report = probe(forward, narrow_only, params, inputs)
    assert report.narrow_threshold == default_threshold(dtype)
    expected = "fail" if dtype == np.float32 else "inconclusive"
    assert report.tensor("layer.b").status == expected, report.tensor("layer.b")
    assert report.tensor("layer.W").status in ("pass", "kink")


def test_header_names_both_thresholds_of_a_float64_run():
    """float32 code that also runs in float64: the header says which threshold judges what."""
    from gradprobe.render.lines import header

    forward, backward, params, inputs = _sensor_layer(np.float32, cast=False)
    line = header(probe(forward, backward, params, inputs))
    assert "threshold 1e-06 (float32 code run in float64; its float32 gradient within 0.00049 of that run)" in line
    forward, backward, params, inputs = _sensor_layer(np.float32, cast=True)
    assert "threshold 0.00049 (float32)" in header(probe(forward, backward, params, inputs))


def test_hint_spans_of_float16_rows_are_taken_in_float64():
    """The term hints' span of float16 rows (a failing float16 target reaches it) is an
    orthonormal basis of the same span (numpy's float64 SVD as the reference)."""
    from gradprobe.hints.terms import _basis

    rows = np.array([[1.0, 2.0, 0.5], [0.25, -1.0, 3.0]], dtype=np.float16)
    q = _basis(rows)
    assert np.allclose(q.T @ q, np.eye(2))
    projected = rows.astype(np.float64) @ q @ q.T
    assert np.allclose(projected, rows.astype(np.float64))


def test_warnings_the_base_point_raises_are_the_users_and_do_not_shrink_steps():
    """A forward that warns at its own point too (np.log(0) in a masked branch) is checked
    as usual; its warning is shown for the calls at its own point (every one, under "always"),
    not for each of the points gradprobe moves to. d/dw sum(w**2) = 2w (power rule)."""
    w = np.array([0.5, -1.5, 2.0])
    zeros = np.zeros(3)

    def forward(p, i):
        masked = np.where(i["z"] > 0, np.log(i["z"]), 0.0)  # warns: divide by zero
        return float(np.sum(p["w"] ** 2) + np.sum(masked))

    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")  # every warning shown is counted
        report = probe(forward, lambda p, i: {"w": 2 * p["w"]}, {"w": w}, {"z": zeros})
    assert report.ok and report.tensor("w").status == "pass"
    shown = [x for x in seen if issubclass(x.category, RuntimeWarning)]
    assert 1 <= len(shown) <= 3 < report.evaluations and "divide by zero" in str(shown[0].message)
