"""second_order = True (protocol section 7) for PyTorch autograd-rule targets: H v taken by
torch's double backward, which differentiates a Function's hand-written backward once more.

Truth comes from outside gradprobe: sympy's symbolic Hessian of the same loss
(autograd_second_kit.py). A Function that recomputes what it needs in backward with torch
operations has the right second derivative; one that saves an intermediate of its forward
(computed outside the graph) has a right gradient and a wrong Hessian.
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest
from autograd_second_kit import GAIN, HESSIAN, LAM, RAW, REF
from conftest import SAMPLES
from framework_kit import need

from gradprobe.api import probe_target
from gradprobe.targets.autograd_hvp import DoubleBackward
from gradprobe.targets.boundary import describe
from gradprobe.common.errors import TargetLoadError
from gradprobe.render.json import report_dict

torch = need("torch")


class Recomputed(torch.autograd.Function):
    """z - lam tanh(z / lam); backward recomputes tanh from the saved inputs."""

    @staticmethod
    def forward(ctx, z, lam):
        ctx.save_for_backward(z, lam)
        return z - lam * torch.tanh(z / lam)

    @staticmethod
    def backward(ctx, grad):
        z, lam = ctx.saved_tensors
        t = torch.tanh(z / lam)
        return grad * t * t, (grad * ((z / lam) * (1 - t * t) - t)).sum(dim=0)


class Saved(torch.autograd.Function):
    """The same values; backward uses tanh saved by forward (no graph behind it)."""

    @staticmethod
    def forward(ctx, z, lam):
        t = torch.tanh(z / lam)
        ctx.save_for_backward(z, lam, t)
        return z - lam * t

    @staticmethod
    def backward(ctx, grad):
        z, lam, t = ctx.saved_tensors
        return grad * t * t, (grad * ((z / lam) * (1 - t * t) - t)).sum(dim=0)


def target(rule, dtype=torch.float64, **extra):
    def setup():
        params = {"gain": torch.tensor(GAIN, dtype=dtype), "lam": torch.tensor(LAM, dtype=dtype)}
        return params, {"raw": torch.tensor(RAW, dtype=dtype), "ref": torch.tensor(REF, dtype=dtype)}

    def forward(p, i):
        return ((rule.apply(i["raw"] * p["gain"], p["lam"]) - i["ref"]) ** 2).mean()

    return SimpleNamespace(setup=setup, forward=forward, second_order=True, **extra)


def double_backward_matrix(rule) -> np.ndarray:
    """The Hessian that torch's double backward gives, column by column, through gradprobe's
    DoubleBackward (numpy in, numpy out)."""
    t = target(rule)
    params, inputs = t.setup()
    b = describe(params, inputs)
    hv = DoubleBackward(t.forward, b, "torch")
    p, i = b.numpy_tree(params), b.numpy_tree(inputs)
    columns = []
    for k in range(4):
        e = np.zeros(4)
        e[k] = 1.0
        out = hv(p, i, {"gain": e[:2], "lam": e[2:]})
        columns.append(np.concatenate([out["gain"], out["lam"]]))
    return np.array(columns).T


def test_double_backward_matches_sympy_for_a_recomputing_rule_only():
    """The ground truth of the verdicts below, against sympy's Hessian."""
    right, wrong = double_backward_matrix(Recomputed), double_backward_matrix(Saved)
    assert np.allclose(right, HESSIAN, rtol=1e-10, atol=1e-12)
    assert np.max(np.abs(wrong - HESSIAN)) > 0.1 * np.max(np.abs(HESSIAN))


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
@pytest.mark.parametrize("rule, right", [(Recomputed, True), (Saved, False)])
def test_double_backward_verdicts(rule, right, dtype):
    report = probe_target(target(rule, dtype))
    data = report_dict(report)
    second = data["second_order"]
    assert second["form"] == "autograd"
    assert all(t["status"] == "pass" for layer in data["layers"] for t in layer["tensors"])
    if right:
        assert report.ok and second["status"] == "pass" and second["error_enters_at"] is None
    else:
        assert not report.ok and second["status"] == "fail"
        assert second["error_enters_at"] == "hessian"
        assert {b["rows"] for b in second["blocks"] if b["status"] == "fail"} == {"gain", "lam"}


def test_second_order_off_skips_double_backward():
    report = probe_target(target(Saved), second_order="off")
    assert report.ok and report_dict(report)["second_order"] is None


def test_callers_torch_state_is_restored():
    t = target(Saved)
    params, inputs = t.setup()
    t.setup = lambda: (params, inputs)
    default = torch.get_default_dtype()
    with torch.no_grad():
        probe_target(t)
        assert not torch.is_grad_enabled()
    assert torch.get_default_dtype() == default
    for tensor in [*params.values(), *inputs.values()]:
        assert not tensor.requires_grad and tensor.grad is None
    assert np.array_equal(params["gain"].numpy(), GAIN) and np.array_equal(inputs["raw"].numpy(), RAW)


def test_second_order_with_a_hand_written_backward_is_refused():
    t = target(Recomputed, backward=lambda p, i: {"gain": p["gain"], "lam": p["lam"]})
    with pytest.raises(TargetLoadError, match="needs a forward-only torch or jax target, but it "
                                              "gives its own backward"):
        probe_target(t)


def test_second_order_on_numpy_arrays_is_refused_in_one_sentence(run_cli, write_target):
    path = write_target("""
        import numpy as np
        second_order = True
        def setup():
            return {"w": np.array([0.5, -1.0])}, {}
        def forward(p, i):
            return float(np.sum(p["w"] ** 4))
        def backward(p, i):
            return {"w": 4 * p["w"] ** 3}
    """)
    result = run_cli("check", str(path))
    assert result.exit_code == 2
    assert "second_order = True takes Hessian-vector products through the framework's double " \
           "backward" in result.output
    assert "Traceback" not in result.output


def test_a_second_order_flag_that_is_not_a_bool_is_refused():
    t = target(Recomputed)
    t.second_order = "yes"
    with pytest.raises(TargetLoadError, match="second_order is 'yes'; it must be True or False"):
        probe_target(t)


def test_sensor_shrink_samples(run_cli):
    """The samples: the recomputing Function passes, the one that saves tanh fails at the
    Hessian while its gradient passes."""
    for name, code in (("sensor_shrink_torch.py", 0), ("sensor_shrink_torch_buggy.py", 1)):
        result = run_cli("check", str(SAMPLES / name), "--json", "-")
        assert result.exit_code == code, result.output
        data = json.loads(result.stdout)
        second = data["second_order"]
        assert second["form"] == "autograd"
        assert all(t["status"] == "pass" for layer in data["layers"] for t in layer["tensors"])
        assert second["error_enters_at"] == (None if code == 0 else "hessian")
