"""Code rounding to bfloat16 inside float32 arrays, correct: it passes where bfloat16 resolves
the threshold, measured on the coordinate at the steps used (engine/sixteen.py), and a wrong
rule still fails.

References outside gradprobe: mpmath's differentiation of the same loss written with mpmath's
arithmetic at the bfloat16 values the code computes with (tests/framework_kit.mp_gradient),
and the mpmath judge of the adversarial generator (tests/adversarial).
"""

from __future__ import annotations

import functools

import mpmath
import numpy as np
import pytest
from framework_kit import mp_gradient, need, rel_gap

from gradprobe.api import probe

ml_dtypes = need("ml_dtypes")
BF16 = np.dtype(ml_dtypes.bfloat16)

# Crop fields: a gain per field, a rainfall reading per field, a price per field.
GAIN = np.array([0.8, -1.3, 0.45, 1.7, -0.6, 1.1], dtype=np.float32)
RAIN = np.array([0.3, 0.45, -0.5, 0.25, 0.4, -0.35], dtype=np.float32)
PRICE = np.array([0.9, 1.4, -0.7, 1.1, 0.6, -1.2], dtype=np.float32)


def _seen(a: np.ndarray) -> np.ndarray:
    return np.asarray(a).astype(BF16).astype(np.float64)


def _mp_loss(values: list) -> object:
    """sum_i p_i swish(g_i r_i) at the values the kernel computes with: gain and rain in
    bfloat16, price in float32 (swish z = z / (1 + exp(-z)))."""
    rain, price = _seen(RAIN), PRICE.astype(np.float64)
    total = mpmath.mpf(0)
    for g, r, p in zip(values, rain, price):
        z = g * mpmath.mpf(float(r))
        total += mpmath.mpf(float(p)) * z / (1 + mpmath.exp(-z))
    return total


@functools.lru_cache(maxsize=1)
def _reference() -> np.ndarray:
    """mpmath's gradient of the kernel's loss at the values it computes with."""
    return mp_gradient(_mp_loss, _seen(GAIN))


def _numpy_target(factor: float):
    """A kernel computing swish(gain * rain) in bfloat16 inside float32 arrays (its output
    cast back to float32, weighted by price and summed there, as a framework's kernel
    returns it), and its rule, also in bfloat16 (``factor`` times the right one)."""
    def forward(params, inputs):
        z = params["gain"].astype(BF16) * inputs["rain"].astype(BF16)
        out = (z / (BF16.type(1) + np.exp(-z))).astype(np.float32)
        return np.float32(np.sum(inputs["price"] * out))

    def backward(params, inputs):
        r = inputs["rain"].astype(BF16)
        z = params["gain"].astype(BF16) * r
        s = BF16.type(1) / (BF16.type(1) + np.exp(-z))
        dz = (s * (BF16.type(1) + z * (BF16.type(1) - s)) * r * BF16.type(factor)).astype(np.float32)
        return {"gain": inputs["price"] * dz}

    return forward, backward, {"gain": GAIN.copy()}, {"rain": RAIN.copy(), "price": PRICE.copy()}


def test_the_numpy_bfloat16_rule_is_right_and_wrong_by_mpmath():
    """Independent of gradprobe: the rule is within bfloat16's rounding of mpmath's gradient at
    the bfloat16 values, and twice it with the factor 2."""
    reference = _reference()
    for factor, (low, high) in ((1.0, (0.0, 0.03)), (2.0, (0.9, 1.1))):
        _, backward, params, inputs = _numpy_target(factor)
        assert low <= rel_gap(backward(params, inputs)["gain"], reference) <= high


@pytest.mark.parametrize("factor", [1.0, 2.0])
def test_a_numpy_rule_rounding_to_bfloat16_inside_passes_when_right(factor):
    """Found to compute in bfloat16; right: every coordinate passes (each moves only its own
    term, whose rounding is measured at the wide steps); twice the gradient fails."""
    report = probe(*_numpy_target(factor))
    assert report.compute_dtype == "bfloat16"
    status = report.tensor("gain").status.value
    assert status == ("pass" if factor == 1.0 else "fail"), report.tensor("gain")


def test_the_jittered_bound_holds_the_mpmath_derivative():
    """The estimate taken with the rounding measured on each coordinate lies within its bound
    of mpmath's derivative of the bfloat16 loss (outside truth: mpmath at the bfloat16 values),
    and that bound resolves the threshold."""
    from gradprobe.engine.evaluate import LossFunction
    from gradprobe.engine.evaluator import Evaluator
    from gradprobe.engine.probe import TensorProbe
    from gradprobe.engine.refine import Taken
    from gradprobe.engine.sixteen import jittered_estimate
    from gradprobe.common.tensors import Workspace

    forward, backward, params, inputs = _numpy_target(1.0)
    ws = Workspace(params, inputs)
    reference = _reference()
    ev = Evaluator(LossFunction(forward, ws, None))
    a = backward(params, inputs)["gain"].astype(np.float64)
    pr = TensorProbe(ev, "gain", ws.owners["gain"].reshape(-1), a, float(ev.base()), BF16, 0.12)
    taken: list[Taken] = []
    est = jittered_estimate(pr, np.arange(GAIN.size), taken)
    assert np.all(np.isfinite(est.error))
    assert np.all(np.abs(est.value - reference) <= est.error), (est.value, reference, est.error)
    assert np.all(est.error <= 0.12 * np.abs(reference))


def _torch_target(factor: float):
    """The same kernel as an autograd Function computing in bfloat16 inside float32 tensors."""
    torch = need("torch")

    class FieldSwish(torch.autograd.Function):
        @staticmethod
        def forward(ctx, gain, rain):
            z = gain.to(torch.bfloat16) * rain.to(torch.bfloat16)
            ctx.save_for_backward(z, gain.to(torch.bfloat16), rain.to(torch.bfloat16))
            return (z * torch.sigmoid(z)).to(gain.dtype)

        @staticmethod
        def backward(ctx, g):
            z, w, r = ctx.saved_tensors
            s = torch.sigmoid(z)
            dz = g.to(torch.bfloat16) * (s * (1 + z * (1 - s))) * factor
            return (dz * r).to(g.dtype), (dz * w).to(g.dtype)

    def forward(params, inputs):
        return (inputs["price"] * FieldSwish.apply(params["gain"], inputs["rain"])).sum()

    as_tensor = lambda a: torch.tensor(a)  # noqa: E731
    return forward, {"gain": as_tensor(GAIN)}, {"rain": as_tensor(RAIN), "price": as_tensor(PRICE)}


def _jax_target(factor: float):
    """The same kernel as a JAX custom_vjp rule computing in bfloat16 inside float32 arrays."""
    jax = need("jax")
    jnp = jax.numpy

    @jax.custom_vjp
    def field_swish(gain, rain):
        z = gain.astype(jnp.bfloat16) * rain.astype(jnp.bfloat16)
        return (z * jax.nn.sigmoid(z)).astype(gain.dtype)

    def fwd(gain, rain):
        return field_swish(gain, rain), (gain.astype(jnp.bfloat16), rain.astype(jnp.bfloat16))

    def bwd(saved, g):
        gb, rb = saved
        z = gb * rb
        s = jax.nn.sigmoid(z)
        dz = g.astype(jnp.bfloat16) * (s * (1 + z * (1 - s))) * factor
        return (dz * rb).astype(g.dtype), (dz * gb).astype(g.dtype)

    field_swish.defvjp(fwd, bwd)

    def forward(params, inputs):
        return jnp.sum(inputs["price"] * field_swish(params["gain"], inputs["rain"]))

    return forward, {"gain": jnp.asarray(GAIN)}, {"rain": jnp.asarray(RAIN), "price": jnp.asarray(PRICE)}


@pytest.mark.parametrize("make", [_torch_target, _jax_target], ids=["torch", "jax"])
def test_the_framework_rules_are_right_and_wrong_by_mpmath(make):
    """Independent of gradprobe: the framework's gradient through the rule is within
    bfloat16's rounding of mpmath's, and twice it with the factor 2."""
    reference = _reference()
    for factor, (low, high) in ((1.0, (0.0, 0.03)), (2.0, (0.9, 1.1))):
        forward, params, inputs = make(factor)
        if make is _torch_target:
            gain = params["gain"].clone().requires_grad_(True)
            forward({"gain": gain}, inputs).backward()
            got = gain.grad.double().numpy()
        else:
            import jax

            got = np.asarray(jax.grad(lambda g: forward({"gain": g}, inputs))(params["gain"]), dtype=np.float64)
        assert low <= rel_gap(got, reference) <= high


@pytest.mark.parametrize("factor", [1.0, 2.0])
@pytest.mark.parametrize("make", [_torch_target, _jax_target], ids=["torch", "jax"])
def test_a_framework_rule_in_bfloat16_inside_passes_when_right(make, factor):
    """An autograd Function or custom_vjp rule computing in bfloat16 inside float32 arrays:
    right, every tensor passes; twice the gradient, gain fails."""
    forward, params, inputs = make(factor)
    report = probe(forward, None, params, inputs)
    assert report.compute_dtype == "bfloat16"
    status = {t.name: t.status.value for t in report.tensors}
    assert status["gain"] == ("pass" if factor == 1.0 else "fail"), status
    if factor == 1.0:
        assert set(status.values()) == {"pass"}, status


# Correct cases of the adversarial generator (category inside16: float64 or float32 arrays
# cast to bfloat16 or float16 inside) once inconclusive for rounding noise at every step,
# now passed where the coordinate's rounding measured at the wide steps resolves the
# threshold (all three float16 inside float64 or float32). Reference: mpmath through the judge.
NOW_PASSING_SEEDS = [6, 202, 228]


@pytest.mark.parametrize("seed", NOW_PASSING_SEEDS)
def test_correct_generated_code_rounding_inside_passes(seed):
    from adversarial import judge

    o = judge("inside16", seed)
    assert o["correct"] and o["unverified"] is None and o["crash"] is None, o
    assert set(o["status"].values()) <= {"pass", "kink"}, o["status"]


def test_a_generated_bug_beside_a_tensor_now_passed_still_fails():
    """inside16-23: a sign flipped in p0; p1, correct, now passes and p0 still fails."""
    from adversarial import judge

    o = judge("inside16", 23)
    assert o["status"] == {"p0": "fail", "p1": "pass"}, o["status"]
    assert o["expect"]["p0"] == "fail"
