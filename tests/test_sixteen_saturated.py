"""16-bit code with a float64 run, where tanh saturates in 16 bits at some elements.

A soft clip c tanh(x / c) in bfloat16 (ml_dtypes arrays, numpy code), weighted by w. Its
derivatives (d tanh u = 1 - tanh^2 u, any table of derivatives): d/dx = w (1 - t^2),
d/dc = w (t - (x / c)(1 - t^2)), t = tanh(x / c). Where |x / c| > 3 or so, t rounds to 1 in
bfloat16 (8 bits) and the 16-bit rule returns 0 for an element whose float64 gradient is a
few thousandths: the 16-bit arithmetic's own answer, a rounding of the terms of size 1 that
the rule combines (1 - t*t), as large as the tensor's typical gradient. Judged against that
scale (as 16-bit code with no wider run is), it is no discrepancy; a rule wrong in 16 bits
only still fails.
"""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe import probe

def _bf16():
    from framework_kit import need

    return need("ml_dtypes").bfloat16


RNG = np.random.default_rng(2)
LEVELS = 3 * RNG.normal(size=(40, 8))  # |x / c| up to about 3.6: saturated in 8 bits
WEIGHTS = RNG.normal(size=(40, 8))


def _case(factor=1.0, sixteen_only=1.0):
    bf16 = _bf16()

    def forward(p, i):
        return np.sum(p["c"] * np.tanh(p["x"] / p["c"]) * i["w"])

    def backward(p, i):
        x, c, w = p["x"], p["c"], i["w"]
        t = np.tanh(x / c)
        dx = w * (1 - t * t) * factor
        if x.dtype == bf16:
            dx = dx * sixteen_only  # a rule that differs in 16 bits only
        return {"x": dx.astype(x.dtype), "c": np.asarray(np.sum(w * (t - (x / c) * (1 - t * t)))).astype(c.dtype)}

    params = {"x": LEVELS.astype(bf16), "c": np.array(2.5, dtype=bf16)}
    return forward, backward, params, {"w": WEIGHTS.astype(bf16)}


def test_the_premise_some_elements_round_far_off_in_bfloat16():
    """Near saturation 1 - t*t in 8 bits is off its float64 value by more than the type's
    threshold (0.12, relative) at some elements, by far less than the typical gradient."""
    bf16 = _bf16()
    x, w = LEVELS.astype(bf16), WEIGHTS.astype(bf16)
    t16 = np.tanh(x / np.array(2.5, dtype=bf16))
    sixteen = (w * (1 - t16 * t16)).astype(np.float64)
    t = np.tanh(x.astype(np.float64) / 2.5)
    wide = w.astype(np.float64) * (1 - t * t)
    rel = np.abs(sixteen - wide) / np.abs(wide)
    assert np.any(rel > 0.12)
    assert np.max(np.abs(sixteen - wide)) < 0.03 * np.sqrt(np.mean(wide ** 2))


def test_the_right_rule_passes():
    forward, backward, params, inputs = _case()
    report = probe(forward, backward, params, inputs)
    status = {t.name: t.status.value for t in report.tensors}
    assert status == {"x": "pass", "c": "pass"}, (status, [d for t in report.tensors for d in t.details][:3])


@pytest.mark.parametrize(("factor", "sixteen_only"), [(1.1, 1.0), (1.0, 1.3), (1.0, -1.0)],
                         ids=["factor-1.1", "16-bit-only-1.3", "16-bit-only-sign"])
def test_a_wrong_rule_fails(factor, sixteen_only):
    forward, backward, params, inputs = _case(factor, sixteen_only)
    report = probe(forward, backward, params, inputs)
    assert report.tensor("x").status.value == "fail", report.tensor("x")


@pytest.mark.parametrize("sixteen_only", [1.0, 1.3], ids=["right", "16-bit-only-1.3"])
def test_the_same_as_a_jax_custom_vjp_rule(sixteen_only):
    """The soft clip as a JAX custom_vjp rule in bfloat16 (reverse mode runs the rule; its
    float64 run too): right passes, a rule 30% off in 16 bits only fails."""
    from framework_kit import need

    jax, jnp = need("jax"), need("jax.numpy")

    @jax.custom_vjp
    def soft_clip(x, c):
        return c * jnp.tanh(x / c)

    def rule_forward(x, c):
        return soft_clip(x, c), (x, c)

    def rule_backward(saved, g):
        x, c = saved
        t = jnp.tanh(x / c)
        dx = g * (1 - t * t)
        if x.dtype == jnp.bfloat16:
            dx = dx * sixteen_only
        dc = jnp.sum(g * (t - (x / c) * (1 - t * t))).reshape(c.shape).astype(c.dtype)
        return dx, dc

    soft_clip.defvjp(rule_forward, rule_backward)

    def forward(p, i):
        return jnp.sum(soft_clip(p["x"], p["c"]) * i["w"])

    rows = slice(0, 12)  # 96 elements, several of them saturated in 8 bits
    params = {"x": jnp.asarray(LEVELS[rows], dtype=jnp.bfloat16), "c": jnp.asarray(2.5, dtype=jnp.bfloat16)}
    report = probe(forward, None, params, {"w": jnp.asarray(WEIGHTS[rows], dtype=jnp.bfloat16)})
    assert report.tensor("x").status.value == ("pass" if sixteen_only == 1.0 else "fail"), report.tensor("x")
    assert report.tensor("c").status.value == "pass"
