"""second_order = True (protocol section 7) for JAX custom_vjp targets: H v by JAX's reverse
mode of its own reverse mode, which differentiates the rule's fwd and bwd once more.

Truth comes from sympy's symbolic Hessian of the same loss (autograd_second_kit.py). A rule
whose residual is differentiable has the right second derivative; one that passes its
residual through stop_gradient has a right gradient and a wrong Hessian.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from autograd_second_kit import GAIN, HESSIAN, LAM, RAW, REF
from framework_kit import need

from gradprobe.api import probe_target
from gradprobe.targets.autograd_hvp import DoubleBackward
from gradprobe.targets.boundary import describe
from gradprobe.render.json import report_dict

jax = need("jax")
jnp = need("jax.numpy")


def _shrink_rule(stopped: bool):
    @jax.custom_vjp
    def shrink(z, lam):
        return z - lam * jnp.tanh(z / lam)

    def fwd(z, lam):
        t = jnp.tanh(z / lam)
        return z - lam * t, (z, lam, jax.lax.stop_gradient(t) if stopped else t)

    def bwd(saved, g):
        z, lam, t = saved
        return g * t * t, jnp.sum(g * ((z / lam) * (1 - t * t) - t), axis=0)

    shrink.defvjp(fwd, bwd)
    return shrink


RIGHT, WRONG = _shrink_rule(False), _shrink_rule(True)


def target(rule, dtype: str = "float64"):
    def setup():
        with jax.enable_x64(dtype == "float64"):
            params = {"gain": jnp.asarray(GAIN, dtype=dtype), "lam": jnp.asarray(LAM, dtype=dtype)}
            return params, {"raw": jnp.asarray(RAW, dtype=dtype), "ref": jnp.asarray(REF, dtype=dtype)}

    def forward(p, i):
        return jnp.mean((rule(i["raw"] * p["gain"], p["lam"]) - i["ref"]) ** 2)

    return SimpleNamespace(setup=setup, forward=forward, second_order=True)


def double_backward_matrix(rule) -> np.ndarray:
    """The Hessian JAX's double reverse mode gives, column by column, through DoubleBackward."""
    t = target(rule)
    params, inputs = t.setup()
    b = describe(params, inputs)
    hv = DoubleBackward(t.forward, b, "jax")
    p, i = b.numpy_tree(params), b.numpy_tree(inputs)
    columns = []
    for k in range(4):
        e = np.zeros(4)
        e[k] = 1.0
        out = hv(p, i, {"gain": e[:2], "lam": e[2:]})
        columns.append(np.concatenate([np.asarray(out["gain"]), np.asarray(out["lam"])]))
    return np.array(columns).T


def test_double_backward_matches_sympy_for_a_differentiable_residual_only():
    right, wrong = double_backward_matrix(RIGHT), double_backward_matrix(WRONG)
    assert np.allclose(right, HESSIAN, rtol=1e-10, atol=1e-12)
    assert np.max(np.abs(wrong - HESSIAN)) > 0.1 * np.max(np.abs(HESSIAN))


@pytest.mark.parametrize("dtype", ["float64", "float32"])
@pytest.mark.parametrize("rule, right", [(RIGHT, True), (WRONG, False)])
def test_double_backward_verdicts(rule, right, dtype):
    x64 = jax.config.read("jax_enable_x64")
    report = probe_target(target(rule, dtype))
    data = report_dict(report)
    second = data["second_order"]
    assert (data["array_library"], second["form"]) == ("jax", "autograd")
    assert all(t["status"] == "pass" for layer in data["layers"] for t in layer["tensors"])
    assert second["status"] == ("pass" if right else "fail")
    assert second["error_enters_at"] == (None if right else "hessian")
    assert report.ok is right
    assert jax.config.read("jax_enable_x64") == x64


def test_second_order_off_skips_jax_double_backward():
    report = probe_target(target(WRONG), second_order="off")
    assert report.ok and report_dict(report)["second_order"] is None
