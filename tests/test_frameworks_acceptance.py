"""Section 6 scenarios met as a user meets them: float32 torch stacks, autograd Functions
with several inputs, what the user's code is handed. Right and wrong are set by closed forms
(d tanh x = 1 - tanh^2 x and d softplus x = sigmoid x, from any table of derivatives) and by
mpmath's differentiation of the same loss (framework_kit.mp_gradient)."""

from __future__ import annotations

import numpy as np
import pytest
from framework_kit import need

from gradprobe.api import probe, probe_stack

torch = need("torch")

RNG = np.random.default_rng(23)
FIELDS = RNG.normal(size=(6, 3))  # soil moisture, sun hours, rain of six fields
YIELDS = RNG.normal(size=(6, 2))  # two crops' yields, standardised
W1, B1 = RNG.normal(size=(3, 4)) * 0.6, RNG.normal(size=4) * 0.2
W2, B2 = RNG.normal(size=(4, 2)) * 0.6, RNG.normal(size=2) * 0.2


class Dense:
    def __init__(self, name):
        self.name = name

    def forward(self, p, x, inputs):
        return x @ p["W"] + p["b"]

    def backward(self, p, x, inputs, g):
        return {"W": x.T @ g, "b": g.sum(0)}, g @ p["W"].T


class Tanh:
    """d tanh x = 1 - tanh^2 x; ``square=False`` forgets the square."""

    def __init__(self, square=True):
        self.name, self.square, self.upstream = "act", square, []

    def forward(self, p, x, inputs):
        return torch.tanh(x)

    def backward(self, p, x, inputs, g):
        self.upstream.append((type(g), g.dtype, x.dtype))
        t = torch.tanh(x)
        return {}, g * (1 - t * t if self.square else 1 - t)


class Squared:
    name = "loss"

    def forward(self, p, x, inputs):
        return 0.5 * ((x - inputs["y"]) ** 2).sum()

    def backward(self, p, x, inputs, g):
        return {}, g * (x - inputs["y"])


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("square", [True, False])
def test_a_torch_stack_in_its_own_dtype(dtype, square):
    """A float32 stack of torch layers: the upstream gradient reaches a layer's backward in
    the layer's own dtype (a float64 one made torch's matmul refuse the float32 weights:
    a crash on a correct stack), the right stack passes and the wrong tanh is where the
    error enters."""
    dt = getattr(torch, dtype)
    act = Tanh(square)
    params = {"hidden": {"W": torch.tensor(W1, dtype=dt), "b": torch.tensor(B1, dtype=dt)},
              "out": {"W": torch.tensor(W2, dtype=dt), "b": torch.tensor(B2, dtype=dt)}}
    inputs = {"x": torch.tensor(FIELDS, dtype=dt), "y": torch.tensor(YIELDS, dtype=dt)}
    report = probe_stack([Dense("hidden"), act, Dense("out"), Squared()], params, inputs)
    assert report.ok is square, [(t.name, t.status) for t in report.tensors]
    assert list(report.error_enters_at) == ([] if square else ["act"])
    assert act.upstream and all(kind is torch.Tensor and g == x for kind, g, x in act.upstream)


# --- 16-bit code whose backward returns 16 bits whatever it is given -----------------------
# Its forward runs in float64 (given float64 values), its backward does not: the float64
# forward is the numeric reference, the 16-bit gradient judged at the type's threshold.
# d/dz tanh(z)^2 = 2 tanh z (1 - tanh^2 z) (chain rule on d tanh = 1 - tanh^2, any table).

LEVELS = RNG.normal(size=40) * 2.0  # reservoir levels, standardised; |z| up to ~4: tanh saturates
WEIGHTS = RNG.normal(size=40)


def _tanh_squared_case(factor, dtype):
    dt = getattr(torch, dtype)

    def forward(p, i):
        return (i["c"] * torch.tanh(p["w"]) ** 2).sum()

    def backward(p, i):
        t = torch.tanh(p["w"])
        return {"w": (factor * i["c"] * 2 * t * (1 - t * t)).to(dt)}  # always the 16-bit type

    return forward, backward, {"w": torch.tensor(LEVELS, dtype=dt)}, {"c": torch.tensor(WEIGHTS, dtype=dt)}


def test_the_tanh_squared_rule_is_right_by_mpmath():
    import mpmath
    from framework_kit import mp_gradient, rel_gap

    w = LEVELS[:6]
    exact = mp_gradient(lambda v: sum(WEIGHTS[k] * mpmath.tanh(v[k]) ** 2 for k in range(6)), w)
    t = np.tanh(w)
    assert rel_gap(WEIGHTS[:6] * 2 * t * (1 - t * t), exact) < 1e-12


@pytest.mark.parametrize("dtype", ["bfloat16", "float16"])
@pytest.mark.parametrize("factor", [1.0, 2.0, -1.0])
def test_a_16_bit_backward_without_a_float64_run(dtype, factor):
    """The right rule passes (elements where tanh saturates to 1 in 16 bits get 0, the
    16-bit arithmetic's own answer: no false alarm); twice the gradient and a flipped sign
    fail (they were left inconclusive by the 16-bit loss's staircase)."""
    forward, backward, params, inputs = _tanh_squared_case(factor, dtype)
    report = probe(forward, backward, params, inputs)
    status = {t.name: t.status.value for t in report.tensors}
    if factor == 1.0:
        assert status["w"] == "pass", report.tensors[0].details[:3]
    else:
        assert status["w"] == "fail"
    assert any("backward returns its" in n for n in report.notes)


@pytest.mark.parametrize("factor", [1.0, 2.0])
def test_ml_dtypes_bfloat16_numpy_backward_cast_to_bfloat16(factor):
    """The same in numpy arrays of ml_dtypes.bfloat16, the backward's result cast with
    .astype(ml_dtypes.bfloat16). d(c tanh w) = c (1 - tanh^2 w)."""
    ml_dtypes = need("ml_dtypes")
    bf16 = ml_dtypes.bfloat16
    w, c = LEVELS[:12].astype(bf16), WEIGHTS[:12].astype(bf16)

    def forward(p, i):
        return np.sum(i["c"] * np.tanh(p["w"]))

    def backward(p, i):
        t = np.tanh(p["w"])
        return {"w": (factor * i["c"] * (1 - t * t)).astype(bf16)}

    report = probe(forward, backward, {"w": w}, {"c": c})
    assert report.tensors[0].dtype == "bfloat16"
    assert report.ok is (factor == 1.0), [(t.name, t.status, t.max_rel_error) for t in report.tensors]
    assert report.tensors[0].status.value == ("pass" if factor == 1.0 else "fail")


def test_a_class_style_torch_layer_writing_into_its_input_leaves_the_callers_tensor():
    """A class-style layer (section 5's adapter) that scales its torch input in place: the
    check is the exit-2 error for a write, and the caller's tensor is bitwise what it was
    (the adapter's first pass, which finds the layers' params, ran the layer on it)."""
    from gradprobe.api import probe_target
    from gradprobe.common.errors import InPlaceWriteError
    from gradprobe.targets.object_stack import object_stack

    class Gain:  # a sensor gain per channel
        def __init__(self):
            self.a = torch.tensor([1.5, 0.5, 2.0], dtype=torch.float64)

        def forward(self, x):
            self.x = x
            x.mul_(1.25)  # the write
            return x * self.a

        def backward(self, d):
            self.da = (d * self.x).sum(0)
            return d * self.a

    class Energy:
        def forward(self, y, labels=None):
            self.y = y
            return 0.5 * (y ** 2).sum()

        def backward(self, d=1.0):
            return self.y * d

    x = torch.tensor(FIELDS[:4], dtype=torch.float64)
    bits = x.numpy().tobytes()
    with pytest.raises(InPlaceWriteError):
        probe_target(object_stack([Gain()], Energy(), x, grads={"Gain": {"a": "da"}}))
    assert x.numpy().tobytes() == bits


class Softplus(torch.autograd.Function):
    """d softplus z = sigmoid z (any table of derivatives)."""

    @staticmethod
    def forward(ctx, z):
        ctx.save_for_backward(z)
        return torch.nn.functional.softplus(z)

    @staticmethod
    def backward(ctx, g):
        (z,) = ctx.saved_tensors
        return g * torch.sigmoid(z)


def test_every_renderer_says_the_arrays_library_and_the_gradients_source():
    """JUnit properties, the HTML settings and the terminal header name torch and autograd
    (JSON has array_library and gradient_source); a numpy target's stay as they were."""
    from gradprobe.api import render_text
    from gradprobe.report.model import TargetRun
    from gradprobe.render.html import render_html
    from gradprobe.render.junit import render_junit

    w = torch.tensor(W1[:, 0], dtype=torch.float32)
    report = probe(lambda p, i: Softplus.apply(p["w"] * 1.5).sum(), None, {"w": w})
    assert report.ok
    junit = render_junit([TargetRun("softplus", 0, report)], "2026-01-01T00:00:00", "host")
    assert '<property name="array_library" value="torch" />' in junit
    assert '<property name="gradient_source" value="autograd" />' in junit
    html = render_html([TargetRun("softplus", 0, report)])
    assert "<dd>torch</dd>" in html and "<dd>autograd</dd>" in html
    assert "torch arrays, autograd gradient" in render_text(report).split("layer / tensor")[0]

    plain = probe(lambda p, i: float(np.sum(p["w"] ** 2)), lambda p, i: {"w": 2 * p["w"]}, {"w": W1[:, 0]})
    assert "arrays" not in render_text(plain).split("layer / tensor")[0]
    assert "<dd>autograd</dd>" not in render_html([TargetRun("squares", 0, plain)])


@pytest.mark.parametrize("factor", [1.0, 2.0, -1.0])
def test_a_bfloat16_only_function_judged_on_its_own_arithmetic(factor):
    """Code that takes bfloat16 and nothing else (forward and backward assert it, as a
    kernel would) has no float64 run: judged on bfloat16 arithmetic, the right rule does not
    fail and twice the gradient or a flipped sign fails. The rounding of the loss along a
    direction was measured with moves rounded unevenly to the grid, so a wrong gradient's
    own error showed as rounding (the larger the error, the larger): 2x stayed inconclusive.
    d(c tanh w) = c (1 - tanh^2 w) (any table of derivatives)."""
    valves = np.random.default_rng(4)
    w0, c0 = valves.normal(size=7), valves.normal(size=7)  # seven valves' openings and flow weights
    w, c = torch.tensor(w0, dtype=torch.bfloat16), torch.tensor(c0, dtype=torch.bfloat16)

    def forward(p, i):
        assert p["w"].dtype == torch.bfloat16
        return (i["c"] * torch.tanh(p["w"])).sum()

    def backward(p, i):
        assert p["w"].dtype == torch.bfloat16
        t = torch.tanh(p["w"])
        return {"w": factor * i["c"] * (1 - t * t)}

    report = probe(forward, backward, {"w": w}, {"c": c})
    assert report.compute_dtype == "bfloat16" and not report.narrow_threshold
    if factor == 1.0:
        assert report.ok
    else:
        assert report.tensors[0].status.value == "fail"


def test_a_bfloat16_only_bump_with_large_and_small_params_is_no_false_alarm():
    """A bfloat16-only kernel z exp(-z^2) (d/dz = exp(-z^2) (1 - 2 z^2), product and chain
    rules) whose params mix a few large values (where the bump is flat) with small ones: a
    direction moved the small ones by the large ones' scale, far past the bump, where the
    loss's change goes flat while the analytic change keeps growing, and the right rule
    failed. The right rule does not fail; twice the gradient still does."""
    rng = np.random.default_rng(3)
    w = torch.tensor(rng.normal(size=12) * 2, dtype=torch.bfloat16)  # soil probes' offsets
    c = torch.tensor(rng.normal(size=12), dtype=torch.bfloat16)
    w64 = w.double().numpy()
    assert np.sum(np.abs(w64) > 4) >= 3 and np.sum(np.abs(w64) < 1.2) >= 6  # both kinds

    def forward(p, i):
        assert p["w"].dtype == torch.bfloat16
        return (i["c"] * p["w"] * torch.exp(-p["w"] * p["w"])).sum()

    def make(factor):
        def backward(p, i):
            assert p["w"].dtype == torch.bfloat16
            z = p["w"]
            return {"w": factor * i["c"] * torch.exp(-z * z) * (1 - 2 * z * z)}
        return backward

    assert probe(forward, make(1.0), {"w": w}, {"c": c}).ok
    assert probe(forward, make(2.0), {"w": w}, {"c": c}).tensors[0].status.value != "pass"


class Heater(torch.autograd.Function):
    """A greenhouse heater's response softplus(beta (x W + b)) / beta with a hand-written
    backward: several inputs, a non-tensor argument (beta, whose gradient is None), ctx
    attributes and needs_input_grad. ``slip`` scales the input gradient (10% off: 1.1)."""

    @staticmethod
    def forward(ctx, x, w, b, beta, slip):
        z = x @ w + b
        ctx.save_for_backward(x, w, z)
        ctx.beta, ctx.slip = beta, slip
        return torch.log1p(torch.exp(beta * z)) / beta

    @staticmethod
    def backward(ctx, g):
        x, w, z = ctx.saved_tensors
        gz = g * torch.sigmoid(ctx.beta * z)  # d softplus = sigmoid
        gx = gz @ w.T * ctx.slip if ctx.needs_input_grad[0] else None
        gw = x.T @ gz if ctx.needs_input_grad[1] else None
        gb = gz.sum(0) if ctx.needs_input_grad[2] else None
        return gx, gw, gb, None, None


def _heater_loss_mp(x_flat):
    """sum c * softplus(1.5 (x W1 + B1)) / 1.5 in mpmath, as a function of x (6 x 3)."""
    import mpmath

    total = mpmath.mpf(0)
    for r in range(6):
        for j in range(4):
            z = sum(x_flat[r * 3 + k] * mpmath.mpf(W1[k, j]) for k in range(3)) + mpmath.mpf(B1[j])
            total += mpmath.mpf(YIELDS[r, j % 2]) * mpmath.log(1 + mpmath.exp(1.5 * z)) / 1.5
    return total


@pytest.mark.parametrize("dtype", ["float64", "float32", "bfloat16"])
@pytest.mark.parametrize("slip", [1.0, 1.1])
def test_a_function_whose_input_gradient_alone_is_10_percent_off(dtype, slip):
    """Only the input's gradient is wrong (10% off): x fails, W and b pass, in every dtype;
    the right Function passes. The rule is checked against mpmath first."""
    from framework_kit import mp_gradient, rel_gap

    dt = getattr(torch, dtype)
    c = torch.tensor(YIELDS[:, [0, 1, 0, 1]], dtype=dt)
    x64 = torch.tensor(FIELDS, dtype=torch.float64, requires_grad=True)
    c64 = torch.tensor(YIELDS[:, [0, 1, 0, 1]])
    loss64 = (c64 * Heater.apply(x64, torch.tensor(W1), torch.tensor(B1), 1.5, 1.0)).sum()
    (gx,) = torch.autograd.grad(loss64, (x64,))
    assert rel_gap(gx.numpy(), mp_gradient(_heater_loss_mp, FIELDS)) < 1e-10

    def forward(p, i):
        return (i["c"] * Heater.apply(i["x"], p["heat"]["W"], p["heat"]["b"], 1.5, slip)).sum()

    params = {"heat": {"W": torch.tensor(W1, dtype=dt), "b": torch.tensor(B1, dtype=dt)}}
    report = probe(forward, None, params, {"x": torch.tensor(FIELDS, dtype=dt), "c": c})
    status = {t.name: t.status.value for t in report.tensors}
    assert status["heat.W"] == "pass" and status["heat.b"] == "pass"
    assert status["x"] == ("pass" if slip == 1.0 else "fail")
    assert report.gradient_source == "autograd" and report.tensor("x").dtype == dtype


@pytest.mark.parametrize("dtype", ["float32", "bfloat16"])
@pytest.mark.parametrize("off", [False, True])
def test_a_custom_vjp_with_one_element_off_is_located(dtype, off):
    """A JAX custom_vjp soft clip z / sqrt(1 + z^2), d/dz = (1 + z^2)^(-3/2) (quotient rule,
    any table), whose backward gets element 2 wrong: w fails at [2] and only there; the
    right rule passes. JAX's 64-bit flag is as it was."""
    jax = need("jax")
    jnp = jax.numpy

    @jax.custom_vjp
    def clip(z):
        return z / jnp.sqrt(1 + z * z)

    def fwd(z):
        return clip(z), z

    def bwd(z, g):
        d = g * (1 + z * z) ** -1.5
        return (d.at[2].set(d[2] * 1.5 + 0.3) if off else d,)

    clip.defvjp(fwd, bwd)
    meter = np.random.default_rng(11)  # water meters' readings, scaled, and their weights
    w, s = jnp.asarray(meter.normal(size=6), dtype=dtype), jnp.asarray(meter.uniform(0.5, 1.5, 6), dtype=dtype)
    flag = jax.config.jax_enable_x64
    report = probe(lambda p, i: jnp.sum(clip(p["w"] * i["s"])), None, {"w": w}, {"s": s})
    assert jax.config.jax_enable_x64 == flag
    t = report.tensor("w")
    if off:
        assert t.status.value == "fail" and [tuple(b) for b in t.bad_indices] == [(2,)]
    else:
        assert report.ok and t.status.value == "pass"
    assert report.array_library == "jax" and t.dtype == dtype
