"""The caller's framework state at the edges of section 6: a check called from inside torch's
inference mode (tensors made there track no graph and no version counter) runs as from
anywhere else and leaves inference mode on. Right and wrong by closed forms (d z^3 = 3 z^2, the
power rule; d softplus z = sigmoid z: any table of derivatives)."""

from __future__ import annotations

import pytest
from framework_kit import need

from gradprobe.api import probe

torch = need("torch")

# soil moisture at three depths (standardised)
MOISTURE = [0.3, -0.2, 0.9]


def _softplus(slip: float):
    class Softplus(torch.autograd.Function):
        @staticmethod
        def forward(ctx, z):
            ctx.save_for_backward(z)
            return torch.nn.functional.softplus(z)

        @staticmethod
        def backward(ctx, g):
            (z,) = ctx.saved_tensors
            return g * slip * torch.sigmoid(z)

    return Softplus


@pytest.mark.parametrize("slip", [1.0, 1.5])
def test_a_check_called_inside_inference_mode(slip):
    """Hand-written backward and autograd rule alike: the right one passes, the wrong one
    fails, and the caller is still in inference mode afterwards with its tensor unchanged."""
    with torch.inference_mode():
        w = torch.tensor(MOISTURE, dtype=torch.float64)
        written = probe(lambda p, i: (p["w"] ** 3).sum(), lambda p, i: {"w": slip * 3 * p["w"] ** 2}, {"w": w})
        ruled = probe(lambda p, i: _softplus(slip).apply(p["w"]).sum(), None, {"w": w})
        assert torch.is_inference_mode_enabled() and not torch.is_grad_enabled()
    assert written.ok is ruled.ok is (slip == 1.0)
    assert w.tolist() == MOISTURE


def test_cupy_not_installed_is_one_sentence_with_the_fix(write_target, run_cli, monkeypatch):
    """Section 6 names CuPy among the array libraries; a target written with it on a machine
    without it is exit 2 with the install step, not "fix it there"."""
    monkeypatch.setitem(__import__("sys").modules, "cupy", None)
    write_target("import cupy\nparams = {'w': cupy.ones(3)}\n"
                 "def forward(p, i):\n    return (p['w'] ** 2).sum()\n")
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert "written with cupy, which is not installed here" in result.output
    assert "pip install cupy" in result.output and "fix it there" not in result.output


@pytest.mark.parametrize("make, words", [
    ("torch.ones(3, device='meta')", "is a torch array whose values cannot be read"),
    ("torch.eye(3, dtype=torch.float64).to_sparse()", "is a torch array whose values cannot be read"),
], ids=["meta device", "sparse layout"])
def test_a_tensor_without_readable_values_is_one_sentence(write_target, run_cli, make, words):
    """Section 3: a param gradprobe cannot read (a meta tensor has no data, a sparse one no
    dense values) is bad input, exit 2 naming the param and the fix; not an internal error."""
    write_target(f"import torch\nparams = {{'w': {make}}}\n"
                 "def forward(p, i):\n    return (p['w'] * p['w']).sum()\n")
    result = run_cli("check", "case.py")
    assert result.exit_code == 2, result.output
    assert f"w {words}" in result.output and "internal error" not in result.output
    assert "dense" in result.output


@pytest.mark.parametrize("source", [
    "import torch\nparams = {'w': torch.ones(3, dtype=torch.float64)}\n"
    "def forward(p, i):\n    return (p['w'].cuda() ** 2).sum()\n",
    "import jax, jax.numpy as jnp\nparams = {'w': jnp.ones(3)}\n"
    "def forward(p, i):\n    return jnp.sum(jax.device_put(p['w'], jax.devices('gpu')[0]) ** 2)\n",
], ids=["torch .cuda()", "jax gpu device"])
def test_a_forward_that_asks_for_an_absent_gpu_names_the_fix(write_target, run_cli, source):
    """Section 6 (issue 19's errors): a GPU the machine lacks, asked for inside forward rather
    than in setup, is the same one sentence with the same fix, exit 2."""
    if torch.cuda.is_available() or ("jax" in source and _jax_has_gpu()):
        pytest.skip("this machine has a GPU")
    write_target(source)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2, result.output
    assert "a GPU that this machine does not have" in result.output
    assert "fix it there" not in result.output


def _jax_has_gpu() -> bool:
    jax = need("jax")
    try:
        return bool(jax.devices("gpu"))
    except RuntimeError:
        return False
