"""Verdicts on the classes of code that made checkers cry wolf or miss bugs.

References: one-sided derivatives from sympy (the pieces differentiated symbolically); the
Huber loss and its derivative as defined by Huber, "Robust Estimation of a Location
Parameter", Annals of Mathematical Statistics 35(1), 1964 (from memory); the rest are facts
of the trade (common practice), named where used.
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy

from gradprobe import probe, render_text

w_sym = sympy.symbols("w")


def _one_sided(left_piece, right_piece, at):
    """(left, right) derivatives of a function made of two sympy pieces meeting at ``at``."""
    return (float(sympy.diff(left_piece, w_sym).subs(w_sym, at)),
            float(sympy.diff(right_piece, w_sym).subs(w_sym, at)))


@pytest.mark.parametrize("convention", ["left", "right"])
def test_relu_kink_followed_by_a_curved_loss_is_a_kink(convention):
    """(relu(w) - 2)**2 at w = 0: sides 0 and -4; either one-sided value is valid."""
    left, right = _one_sided(sympy.Integer(4), (w_sym - 2) ** 2, 0)
    analytic = left if convention == "left" else right
    w = np.array([0.0, 0.7])

    def forward(p, i):
        return float(np.sum((np.maximum(p["w"], 0) - 2) ** 2))

    def backward(p, i):  # relu'(0) taken as 0 (left) or 1 (right)
        mask = p["w"] > 0 if convention == "left" else p["w"] >= 0
        return {"w": 2 * (np.maximum(p["w"], 0) - 2) * mask}

    assert backward({"w": w}, {})["w"][0] == analytic
    report = probe(forward, backward, {"w": w})
    t = report.tensor("w")
    assert t.status == "kink" and t.kink_indices == ((0,),), render_text(report)


def test_a_value_outside_both_sides_of_a_curved_kink_fails():
    w = np.array([0.0, 0.7])

    def forward(p, i):
        return float(np.sum((np.maximum(p["w"], 0) - 2) ** 2))

    def backward(p, i):
        g = 2 * (np.maximum(p["w"], 0) - 2) * (p["w"] > 0)
        g[0] = 3.0  # sides are 0 and -4: 3 lies more than half the jump (2) outside
        return {"w": g}

    assert probe(forward, backward, {"w": w}).tensor("w").bad_indices == ((0,),)


@pytest.mark.parametrize("offset", [1e-9, -1e-9, 1e-7])
def test_a_pre_activation_a_hair_from_zero_passes_with_its_own_sides_derivative(offset):
    """relu(x . w) with x . w = offset: the derivative is that of the side it lies on."""
    x = np.array([1.0, -1.0])
    w = np.array([0.5 + offset, 0.5])

    def forward(p, i):
        z = float(x @ p["w"])
        return (max(z, 0.0) - 2.0) ** 2

    def backward(p, i):
        z = float(x @ p["w"])
        return {"w": 2 * (max(z, 0.0) - 2.0) * (z > 0) * x}

    report = probe(forward, backward, {"w": w})
    assert report.ok and report.tensor("w").status in ("pass", "kink"), render_text(report)


def _huber(r, delta):
    return np.where(np.abs(r) <= delta, 0.5 * r**2, delta * (np.abs(r) - 0.5 * delta))


def _huber_grad(r, delta):
    return np.clip(r, -delta, delta)


@pytest.mark.parametrize("scale", [1e-4, 1.0, 1e3])
def test_huber_at_its_switch_point_is_a_pass_not_a_kink(scale):
    """Huber's loss has a continuous first derivative; only the second jumps at |r| = delta."""
    delta = 0.5 * scale
    y = np.array([0.0, 0.0, 0.0, 0.0]) * scale
    w = np.array([delta, -delta, 0.1 * scale, 2.0 * scale])  # the first two sit on the switch

    def forward(p, i):
        return float(np.sum(_huber(p["w"] - i["y"], delta)))

    report = probe(forward, lambda p, i: {"w": _huber_grad(p["w"] - i["y"], delta)},
                   {"w": w}, {"y": y})
    t = report.tensor("w")
    assert t.status == "pass" and t.inconclusive == 0, render_text(report)
    wrong = probe(forward, lambda p, i: {"w": 1.01 * _huber_grad(p["w"] - i["y"], delta)},
                  {"w": w}, {"y": y})
    assert wrong.tensor("w").failed == 4


def test_cubic_spline_knot_is_a_pass():
    """A C2 cubic spline: (w - k)**3 for w > k, 0 below; the third derivative jumps at k."""
    w = np.array([0.25, 0.6])

    def forward(p, i):
        return float(np.sum(np.where(p["w"] > 0.25, (p["w"] - 0.25) ** 3, 0.0) + p["w"] ** 2))

    def backward(p, i):
        return {"w": np.where(p["w"] > 0.25, 3 * (p["w"] - 0.25) ** 2, 0.0) + 2 * p["w"]}

    report = probe(forward, backward, {"w": w})
    assert report.tensor("w").status == "pass", render_text(report)


def _batch_normalised(p, i):
    z = i["x"] @ p["W"] + p["b"]
    zc = z - z.mean(axis=0)
    return zc / np.sqrt((zc**2).mean(axis=0) + 1e-5)


def test_exactly_zero_gradient_of_a_bias_before_batch_normalisation_passes():
    """The batch mean removes the bias: its gradient is exactly 0 (common practice)."""
    rng = np.random.default_rng(4)
    params = {"W": rng.normal(size=(3, 4)), "b": rng.normal(size=4)}
    inputs = {"x": rng.normal(size=(16, 3)), "t": rng.normal(size=(16, 4))}

    def forward(p, i):
        return float(np.sum(_batch_normalised(p, i) * i["t"]))

    def backward(p, i):
        z = i["x"] @ p["W"] + p["b"]
        zc = z - z.mean(axis=0)
        var = (zc**2).mean(axis=0) + 1e-5
        n = z.shape[0]
        xhat = zc / np.sqrt(var)
        g = i["t"]
        dz = (g - g.mean(axis=0) - xhat * (g * xhat).mean(axis=0)) / np.sqrt(var)
        assert n == 16
        return {"W": i["x"].T @ dz, "b": np.zeros(4)}

    report = probe(forward, backward, params, inputs)
    b = report.tensor("b")
    assert report.ok and b.status == "pass", render_text(report)
    assert b.worst_noise is None or b.worst_noise < 1.0


def test_complex_step_through_a_variance_falls_back_to_central_differences():
    """np.var conjugates: the complex step is wrong there, the backward is right."""
    rng = np.random.default_rng(5)
    w = rng.normal(size=6)

    def forward(p, i):
        return np.var(p["w"]) + np.sum(p["w"] ** 3)

    def backward(p, i):
        return {"w": 2 * (p["w"] - p["w"].mean()) / p["w"].size + 3 * p["w"] ** 2}

    report = probe(forward, backward, {"w": w}, method="complex")
    assert report.ok, render_text(report)
    assert report.notes == (
        "forward is not complex-safe for w (the complex step and central differences "
        "disagree: np.abs, np.var, conjugation or np.real in its path?), so central "
        "differences were used for it",
    )
    wrong = probe(forward, lambda p, i: {"w": -backward(p, i)["w"]}, {"w": w}, method="complex")
    assert not wrong.ok


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_small_gradients_among_large_ones_pass(dtype):
    """Coordinates whose gradient is 1e-3 of their tensor's rms are not left inconclusive."""
    c = np.array([1.0, -1.0, 1e-3, 2e-3, 1.0], dtype=dtype)
    w = np.array([0.3, 0.2, -0.4, 0.1, 0.5], dtype=dtype)

    def forward(p, i):
        return np.sum(i["c"] * np.sin(p["w"]))

    report = probe(forward, lambda p, i: {"w": i["c"] * np.cos(p["w"])}, {"w": w}, {"c": c})
    t = report.tensor("w")
    assert report.ok and t.status == "pass", render_text(report)


def _float32_dense(bias_factor):
    """A float32 dense layer with squared error (shop demand from four store features)."""
    rng = np.random.default_rng(8)
    params = {"W": rng.normal(size=(4, 3)).astype(np.float32),
              "b": rng.normal(size=3).astype(np.float32)}
    inputs = {"x": rng.normal(size=(64, 4)).astype(np.float32),
              "y": rng.normal(size=(64, 3)).astype(np.float32)}

    def forward(p, i):
        r = i["x"] @ p["W"] + p["b"] - i["y"]
        return 0.5 * np.sum(r * r)

    def backward(p, i):
        r = i["x"] @ p["W"] + p["b"] - i["y"]
        return {"W": i["x"].T @ r, "b": bias_factor * r.sum(axis=0)}

    return probe(forward, backward, params, inputs)


def test_correct_float32_layer_passes():
    report = _float32_dense(1.0)
    assert report.ok and report.compute_dtype == "float32", render_text(report)


@pytest.mark.parametrize("factor", [1.008, 1.005, 0.995])
def test_half_a_percent_error_in_a_float32_bias_fails(factor):
    report = _float32_dense(factor)
    assert report.tensor("b").status == "fail" and report.tensor("W").status == "pass", render_text(report)


def test_a_float32_step_that_overflows_shrinks_instead_of_stopping_the_check():
    """exp of float32 overflows just above 88.72 (common practice: log(float32 max)); the
    point sits 4e-6 below that edge, inside the usual float32 step of about 5e-3 * |x|."""
    w = np.array([88.7, 1.0], dtype=np.float32)

    def forward(p, i):
        with np.errstate(over="ignore"):
            return np.sum(np.exp(p["w"].astype(np.float32))) * np.float32(1e-30)

    def backward(p, i):
        return {"w": np.exp(p["w"].astype(np.float32)) * np.float32(1e-30)}

    report = probe(forward, backward, {"w": w})
    assert report.ok, render_text(report)


def test_a_float32_only_error_in_backward_fails_against_its_float64_run():
    """A branch taken only for float32 arrays: the float64 run is right, float32 is not."""
    rng = np.random.default_rng(9)
    w = rng.normal(size=5).astype(np.float32)

    def forward(p, i):
        return np.sum(np.sin(p["w"]))

    def backward(p, i):
        g = np.cos(p["w"])
        return {"w": g * np.float32(1.05) if g.dtype == np.float32 else g}

    t = probe(forward, backward, {"w": w}).tensor("w")
    assert t.status == "fail" and t.failed == 5
    assert all(abs(d.analytic / d.numeric - 1.05) < 1e-3 for d in t.details)


def test_float32_code_that_rounds_to_float32_itself_keeps_the_float32_threshold():
    w = np.linspace(0.1, 1.0, 6, dtype=np.float32)

    def forward(p, i):
        return np.sum(np.exp(p["w"]))

    def backward(p, i):
        return {"w": np.exp(p["w"]).astype(np.float32)}

    report = probe(forward, backward, {"w": w})
    # 2 sqrt(u) = 2**-11 to two digits, u = 2**-24 (IEEE 754 binary32)
    assert report.ok and report.threshold == 4.9e-4 and report.compute_dtype == "float32"


def test_a_forward_that_is_non_finite_at_every_moved_point_is_one_sentence():
    """A domain edge at the point itself: no step, however small, gives a finite loss."""
    from gradprobe.common.errors import BadOutputError

    w = np.array([0.0, 1.0])

    def forward(p, i):
        with np.errstate(divide="ignore", invalid="ignore"):
            return float(np.sum(np.sqrt(p["w"]) * 0 + np.log(p["w"][1])) + np.sqrt(-abs(p["w"][0])))

    with pytest.raises(BadOutputError) as info:
        probe(forward, lambda p, i: {"w": np.array([0.0, 1.0])}, {"w": w}, label="edge")
    assert str(info.value).startswith(
        "edge: forward returned a non-finite value when w[0] (flat index) was moved by ")
    assert ", however small the step; guard what overflows" in str(info.value)


def _tied_max(scale_first):
    """Daily demand as the max of two identical forecasters over 12 shops: every row ties.

    The backward routes each row's upstream gradient to the first forecaster (the usual
    convention for a tie), which sums to left + right along a coordinate of that forecaster
    when the rows' kinks coincide (facts of the trade: common practice for max ties)."""
    rng = np.random.default_rng(11)
    x = rng.normal(size=(12, 3))
    g = rng.normal(size=12)
    W = rng.normal(size=(3, 1))
    params = {"W": np.hstack([W, W])}

    def forward(p, i):
        z = i["x"] @ p["W"]
        return float(np.sum(i["g"] * np.max(z, axis=1)))

    def backward(p, i):
        z = i["x"] @ p["W"]
        first = z[:, 0] >= z[:, 1]
        dz = np.zeros_like(z)
        dz[first, 0] = i["g"][first]
        dz[~first, 1] = i["g"][~first]
        grad = i["x"].T @ dz
        grad[:, 0] *= scale_first
        return {"W": grad}

    return probe(forward, backward, params, {"x": x, "g": g})


def test_a_max_tied_in_every_row_is_a_kink_not_a_false_alarm():
    t = _tied_max(1.0).tensor("W")
    assert t.status == "kink" and t.failed == 0, render_text(_tied_max(1.0))


def test_a_value_beyond_every_convention_at_tied_rows_fails():
    assert _tied_max(3.0).tensor("W").failed > 0


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_a_gradient_for_a_param_forward_ignores_fails(dtype):
    """The loss never changes as ``unused`` moves, so its derivative is 0 (the loss does not
    depend on it); a backward that gives it a gradient fails, in float32 too (a loss that does
    not change is rounding only where larger steps saw it change)."""
    w = np.array([0.3, -0.2], dtype=dtype)

    def forward(p, i):
        return np.sum(p["w"] ** 2, dtype=dtype)

    def backward(p, i):
        return {"w": 2 * p["w"], "unused": np.full(3, 0.25, dtype=dtype)}

    report = probe(forward, backward, {"w": w, "unused": np.array([1.0, 2.0, 3.0], dtype=dtype)})
    assert report.tensor("unused").status == "fail", render_text(report)
    assert report.tensor("w").status == "pass"


def _near_kink_under_rounding(factor):
    """10 + 1e-3 * sum(sin w) + 5 relu(w0) at w0 = -1e-7: the loss rounds at ~1e-15, so a
    step that stays left of the kink (< 1e-7) cannot resolve the 1e-6 threshold, and a
    two-sided step crosses the kink. d sin/dw = cos (sympy)."""
    w = np.array([-1e-7, 0.8, -1.1])
    slope = sympy.lambdify(w_sym, sympy.diff(sympy.sin(w_sym), w_sym), "numpy")

    def forward(p, i):
        return float(10.0 + 1e-3 * np.sum(np.sin(p["w"])) + 5.0 * max(p["w"][0], 0.0))

    def backward(p, i):
        g = 1e-3 * slope(p["w"]) + 5.0 * (p["w"] > 0) * np.array([1.0, 0.0, 0.0])
        g[0] *= factor
        return {"w": g}

    return probe(forward, backward, {"w": w})


def test_a_kink_near_the_point_under_heavy_rounding_is_decided_by_its_clean_side():
    report = _near_kink_under_rounding(1.0)
    assert report.tensor("w").status == "pass", render_text(report)
    assert _near_kink_under_rounding(1.01).tensor("w").bad_indices == ((0,),)


def _float32_tie():
    """Hourly sensor gains w against targets y in float32: y[0] is w[0] * x[0] rounded to
    float32, so float32 code sits exactly on the absolute error's kink (np.sign(0) = 0 there),
    while its float64 run, at the same values, is one float32 rounding (~1e-8) off it."""
    x = np.array([870.0, 655.5, -912.0], dtype=np.float32)
    w = np.array([17.1, 12.7, -14.4], dtype=np.float32)
    y = np.array([w[0] * x[0], 8100.0, 12800.0], dtype=np.float32)
    assert float(w[0]) * float(x[0]) != float(y[0])  # the float64 run is off the kink

    def forward(p, i):
        r = p["w"] * i["x"] - i["y"]
        return np.sum(np.abs(r)) + 0.5 * np.sum(p["w"] ** 2)

    def backward(p, i):  # d|r|/dr = sign(r) (0 at the kink), d(w**2/2)/dw = w
        return {"w": np.sign(p["w"] * i["x"] - i["y"]) * i["x"] + p["w"]}

    return probe(forward, backward, {"w": w}, {"x": x, "y": y})


def test_float32_code_on_a_kink_its_float64_run_just_misses_is_a_kink():
    report = _float32_tie()
    t = report.tensor("w")
    assert t.status == "kink" and t.kink_indices == ((0,),), render_text(report)
