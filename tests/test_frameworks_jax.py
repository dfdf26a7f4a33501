"""JAX targets (protocol section 6), in one module so that JAX is imported once: custom_vjp
rules right and wrong in float64, float32 and bfloat16, arrays reaching the user's code as
JAX arrays, and JAX's 64-bit flag as it was after any check.

Right and wrong are established independently of gradprobe by mpmath on the same loss.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from framework_kit import assert_bfloat16_inside_verdict, check_ending, mp_gradient, need, rel_gap

from gradprobe.api import probe
from gradprobe.common.errors import GraphLeftError
from gradprobe.render.json import report_dict

jax = need("jax")
jnp = need("jax.numpy")


def _softplus_rule(wrong: bool):
    @jax.custom_vjp
    def softplus(z):
        return jnp.logaddexp(z, 0.0)

    def fwd(z):
        return softplus(z), z

    def bwd(z, g):
        slope = jax.nn.sigmoid(-z) if wrong else jax.nn.sigmoid(z)  # d softplus = sigmoid
        return (g * slope,)

    softplus.defvjp(fwd, bwd)
    return softplus


RIGHT, WRONG = _softplus_rule(False), _softplus_rule(True)
RNG = np.random.default_rng(21)
X = RNG.normal(size=(4, 3))
W = RNG.normal(size=(3, 2))


def mp_loss_at(x: np.ndarray):
    """w -> sum_ij softplus((x W)_ij)^2, with mpmath (W flat, row-major)."""
    def loss(w: list) -> object:
        total = mpmath.mpf(0)
        for i in range(4):
            for j in range(2):
                z = sum(mpmath.mpf(x[i, k]) * w[k * 2 + j] for k in range(3))
                total += mpmath.log(1 + mpmath.exp(z)) ** 2
        return total
    return loss


mp_loss = mp_loss_at(X)


REFERENCE = mp_gradient(mp_loss, W)


def loss_of(rule):
    def forward(params, inputs):
        return jnp.sum(rule(inputs["x"] @ params["w"]) ** 2)
    return forward


def arrays(dtype: str):
    with jax.enable_x64(dtype == "float64"):
        return ({"w": jnp.asarray(W, dtype=dtype)}, {"x": jnp.asarray(X, dtype=dtype)})


def test_the_rules_are_right_and_wrong_by_mpmath():
    with jax.enable_x64(True):
        params, inputs = arrays("float64")
        for rule, right in ((RIGHT, True), (WRONG, False)):
            grad = jax.grad(lambda w, rule=rule: loss_of(rule)({"w": w}, inputs))(params["w"])
            gap = rel_gap(np.asarray(grad), REFERENCE)
            assert (gap < 1e-12) if right else (gap > 0.05)


@pytest.mark.parametrize("dtype", ["float64", "float32", "bfloat16"])
@pytest.mark.parametrize("rule, right", [(RIGHT, True), (WRONG, False)])
def test_custom_vjp_verdicts(dtype, rule, right):
    x64 = jax.config.read("jax_enable_x64")
    params, inputs = arrays(dtype)
    report = probe(loss_of(rule), None, params, inputs)
    assert report.ok is right
    data = report_dict(report)
    assert (data["array_library"], data["gradient_source"]) == ("jax", "autograd")
    w = data["layers"][0]["tensors"][0]
    assert (w["name"], w["dtype"]) == ("w", dtype)
    assert jax.config.read("jax_enable_x64") == x64
    assert not any("no hand-written" in n for n in report.notes)


def _bf16_dense_rule(factor: float):
    """softplus(x @ w) computed in bfloat16 whatever the arrays' type, cast back, with a rule
    in bfloat16 too whose gradients are ``factor`` times the right ones (1: right)."""
    @jax.custom_vjp
    def dense(x, w):
        return jnp.logaddexp(x.astype(jnp.bfloat16) @ w.astype(jnp.bfloat16), 0.0).astype(w.dtype)

    def fwd(x, w):
        return dense(x, w), (x.astype(jnp.bfloat16), w.astype(jnp.bfloat16))

    def bwd(saved, g):
        xb, wb = saved
        dz = g.astype(jnp.bfloat16) * jax.nn.sigmoid(xb @ wb)  # d softplus = sigmoid
        return ((dz @ wb.T * factor).astype(g.dtype), (xb.T @ dz * factor).astype(g.dtype))

    dense.defvjp(fwd, bwd)
    return dense


def _inside_loss(rule):
    def forward(params, inputs):
        return jnp.sum(rule(inputs["x"], params["w"]) ** 2)
    return forward


def test_the_bfloat16_rule_is_right_and_wrong_by_mpmath():
    """Independent of gradprobe: the rule's gradient is within bfloat16's rounding of
    mpmath's at the bfloat16 values it computes with, and twice it with the factor 2."""
    params, inputs = arrays("float32")
    xb = np.asarray(inputs["x"].astype(jnp.bfloat16), dtype=np.float64)
    wb = np.asarray(params["w"].astype(jnp.bfloat16), dtype=np.float64)

    reference = mp_gradient(mp_loss_at(xb), wb)  # the same loss at the bfloat16 values
    for factor, (low, high) in ((1.0, (0.0, 0.05)), (2.0, (0.9, 1.1))):
        grad = jax.grad(lambda w, f=factor: _inside_loss(_bf16_dense_rule(f))({"w": w}, inputs))(params["w"])
        assert low <= rel_gap(np.asarray(grad, dtype=np.float64), reference) <= high


@pytest.mark.parametrize("factor", [1.0, 2.0, -1.0])
def test_a_custom_vjp_rounding_to_bfloat16_inside_float32_arrays(factor):
    """A bfloat16 rule in float32 arrays has no wider run: found to compute in bfloat16 and
    judged on that arithmetic. Right: nothing fails; twice the gradient, or its sign
    flipped: w fails."""
    params, inputs = arrays("float32")
    assert_bfloat16_inside_verdict(probe(_inside_loss(_bf16_dense_rule(factor)), None, params, inputs), factor)


def test_jax_arrays_reach_a_hand_written_backward_as_jax_arrays():
    seen = []
    params, inputs = arrays("float32")

    def forward(p, i):
        seen.append((isinstance(p["w"], jax.Array), str(p["w"].dtype)))
        return jnp.tanh(i["x"] @ p["w"])  # an array output

    def backward(p, i, g):
        seen.append((isinstance(g, jax.Array), str(p["w"].dtype)))
        t = jnp.tanh(i["x"] @ p["w"])
        return {"w": i["x"].T @ (g * (1 - t * t))}  # d tanh = 1 - tanh^2

    assert probe(forward, backward, params, inputs).ok
    assert seen and all(ok for ok, _ in seen)
    assert {d for _, d in seen} >= {"float32"}


def test_plain_jax_forward_is_noted():
    params, inputs = arrays("float32")
    report = probe(lambda p, i: jnp.sum(jnp.logaddexp(i["x"] @ p["w"], 0.0) ** 2), None, params, inputs)
    assert report.ok
    assert any("custom_vjp or custom_jvp" in n for n in report.notes)


def test_a_forward_that_leaves_the_trace_is_an_error():
    params, inputs = arrays("float32")

    def forward(p, i):
        return float(np.sum(np.asarray(i["x"]) @ np.asarray(p["w"])))

    with pytest.raises(GraphLeftError, match="leaves jax's graph"):
        probe(forward, None, params, inputs)


def test_river_gauge_samples(run_cli):
    import json

    from conftest import SAMPLES

    right = run_cli("check", str(SAMPLES / "river_gauge_jax.py"), "--json", "-")
    wrong = run_cli("check", str(SAMPLES / "river_gauge_jax_buggy.py"), "--json", "-")
    assert (right.exit_code, wrong.exit_code) == (0, 1)
    failing = {t["name"] for layer in json.loads(wrong.stdout)["layers"] for t in layer["tensors"]
               if t["status"] == "fail"}
    assert failing == {"response", "base", "rain"}  # level does not pass through the rule


@pytest.mark.parametrize("ending", ["pass", "fail", "crash", "interrupt"])
def test_the_64_bit_flag_is_restored(ending):
    """Whatever forward does to JAX's 64-bit flag, and however the check ends."""
    before = jax.config.read("jax_enable_x64")
    params, inputs = arrays("float32")
    calls = [0]

    def forward(p, i):
        calls[0] += 1
        jax.config.update("jax_enable_x64", not before)
        if calls[0] > 4 and ending in ("crash", "interrupt"):
            raise RuntimeError("gauge offline") if ending == "crash" else KeyboardInterrupt
        return loss_of(WRONG if ending == "fail" else RIGHT)(p, i)

    try:
        check_ending(forward, params, inputs, ending)
        assert jax.config.read("jax_enable_x64") == before
    finally:
        jax.config.update("jax_enable_x64", before)
