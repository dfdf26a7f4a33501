"""PyTorch targets (protocol section 6): tensors reach the user's code as tensors, autograd
Functions are checked right and wrong in float64, float32 and bfloat16, and the caller's
torch state is as it was after any check.

Whether a rule is right or wrong is established here independently of gradprobe: by
mpmath's differentiation of the same loss written with mpmath's arithmetic.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from framework_kit import assert_bfloat16_inside_verdict, check_ending, mp_gradient, need, rel_gap, swish_function

from gradprobe.api import probe
from gradprobe.common.errors import GraphLeftError, InPlaceWriteError, TargetLoadError
from gradprobe.render.json import report_dict

torch = need("torch")


Swish = swish_function()  # x * sigmoid(x) with a hand-written backward


class SwishWrong(Swish):
    """The same with the sigmoid's derivative confused: s (1 + z s)."""

    @staticmethod
    def backward(ctx, g):
        (z,) = ctx.saved_tensors
        s = torch.sigmoid(z)
        return g * (s * (1 + z * s))


RNG = np.random.default_rng(11)
X = RNG.normal(size=(5, 4))
W = RNG.normal(size=(4, 3))
C = RNG.normal(size=(5, 3))  # weights of the scalar loss


def mp_loss(w_flat: list) -> object:
    """sum_ij C_ij swish((X W)_ij), written with mpmath."""
    total = mpmath.mpf(0)
    for i in range(5):
        for j in range(3):
            z = sum(mpmath.mpf(X[i, k]) * w_flat[k * 3 + j] for k in range(4))
            total += mpmath.mpf(C[i, j]) * z / (1 + mpmath.exp(-z))
    return total


def loss_of(function):
    def forward(params, inputs):
        return (function.apply(inputs["x"] @ params["w"]) * inputs["c"]).sum()
    return forward


def tensors(dtype):
    return ({"w": torch.tensor(W).to(dtype)},
            {"x": torch.tensor(X).to(dtype), "c": torch.tensor(C).to(dtype)})


def rule_gradient(function, dtype) -> np.ndarray:
    """The rule's own gradient of the loss with respect to w, by torch, as float64."""
    params, inputs = tensors(dtype)
    w = params["w"].clone().requires_grad_(True)
    loss_of(function)({"w": w}, inputs).backward()
    return w.grad.double().numpy()


REFERENCE = mp_gradient(mp_loss, W)


def test_the_rules_are_right_and_wrong_by_mpmath():
    """Independent of gradprobe: the right rule matches mpmath in float64, the wrong one is
    off by far more than rounding, and the right one in bfloat16 is several bfloat16 units
    off (its own rounding, which a correct check must allow)."""
    assert rel_gap(rule_gradient(Swish, torch.float64), REFERENCE) < 1e-12
    assert rel_gap(rule_gradient(SwishWrong, torch.float64), REFERENCE) > 0.05
    assert rel_gap(rule_gradient(Swish, torch.bfloat16), REFERENCE) > 2.0**-8


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32, torch.bfloat16])
@pytest.mark.parametrize("function, right", [(Swish, True), (SwishWrong, False)])
def test_autograd_function_verdicts(dtype, function, right):
    params, inputs = tensors(dtype)
    before = {n: t.clone() for n, t in {**params, **inputs}.items()}
    report = probe(loss_of(function), None, params, inputs)
    assert report.ok is right
    for name, tensor in {**params, **inputs}.items():  # bitwise, in the caller's dtype
        assert tensor.dtype == dtype and torch.equal(tensor.view(torch.int8), before[name].view(torch.int8))
        assert not tensor.requires_grad and tensor.grad is None
    data = report_dict(report)
    assert data["array_library"] == "torch"
    assert data["gradient_source"] == "autograd"
    w = next(t for layer in data["layers"] for t in layer["tensors"] if t["name"] == "w")
    assert w["dtype"] == str(dtype).removeprefix("torch.")
    assert "device" not in w  # CPU
    if not right:
        assert w["status"] == "fail"


def _bf16_dense(factor):
    """An autograd Function: swish(x @ w) computed in bfloat16 whatever the tensors' type,
    cast back (a bfloat16 kernel inside float32 tensors); its backward too, with every
    gradient times ``factor`` (1: right)."""

    class Bf16Dense(torch.autograd.Function):
        @staticmethod
        def forward(ctx, x, w):
            xb, wb = x.to(torch.bfloat16), w.to(torch.bfloat16)
            z = xb @ wb
            ctx.save_for_backward(xb, wb, z)
            return (z * torch.sigmoid(z)).to(w.dtype)

        @staticmethod
        def backward(ctx, g):
            xb, wb, z = ctx.saved_tensors
            s = torch.sigmoid(z)
            dz = g.to(torch.bfloat16) * (s * (1 + z * (1 - s)))
            return ((dz @ wb.T) * factor).to(g.dtype), ((xb.T @ dz) * factor).to(g.dtype)

    return Bf16Dense


def _inside_loss(function):
    def forward(params, inputs):
        return (function.apply(inputs["x"], params["w"]) * inputs["c"]).sum()
    return forward


def test_the_bfloat16_kernel_is_right_and_wrong_by_mpmath():
    """Independent of gradprobe: the kernel's gradient is within bfloat16's rounding of
    mpmath's at the bfloat16 values it computes with, and twice it with the factor 2."""
    params, inputs = tensors(torch.float32)
    seen = {k: v.to(torch.bfloat16).double().numpy() for k, v in {**params, **inputs}.items()}

    def loss(w_flat):  # sum_ij C_ij swish((X W)_ij) at the bfloat16 values
        total = mpmath.mpf(0)
        for i in range(5):
            for j in range(3):
                z = sum(mpmath.mpf(seen["x"][i, k]) * w_flat[k * 3 + j] for k in range(4))
                total += mpmath.mpf(float(inputs["c"][i, j])) * z / (1 + mpmath.exp(-z))
        return total

    reference = mp_gradient(loss, seen["w"])
    for factor, (low, high) in ((1.0, (0.0, 0.05)), (2.0, (0.9, 1.1))):
        w = params["w"].clone().requires_grad_(True)
        _inside_loss(_bf16_dense(factor))({"w": w}, inputs).backward()
        assert low <= rel_gap(w.grad.double().numpy(), reference) <= high


@pytest.mark.parametrize("factor", [1.0, 2.0, -1.0])
def test_an_autograd_function_rounding_to_bfloat16_inside_float32_tensors(factor):
    """A bfloat16 kernel in float32 tensors has no wider run (it casts to bfloat16 whatever
    it is given): found to compute in bfloat16 and judged on that arithmetic. Right: nothing
    fails; twice the gradient, or its sign flipped: w fails."""
    params, inputs = tensors(torch.float32)
    assert_bfloat16_inside_verdict(probe(_inside_loss(_bf16_dense(factor)), None, params, inputs), factor)


def test_plain_torch_forward_says_no_rule_was_on_the_path():
    params, inputs = tensors(torch.float64)

    def forward(p, i):
        z = i["x"] @ p["w"]
        return (z * torch.sigmoid(z) * i["c"]).sum()

    report = probe(forward, None, params, inputs)
    assert report.ok
    assert any("no hand-written derivative rule" in n for n in report.notes)
    assert not any("no hand-written" in n for n in probe(loss_of(Swish), None, params, inputs).notes)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64, torch.bfloat16])
def test_tensors_reach_the_users_code_as_tensors(dtype):
    """forward and backward get torch tensors of the caller's dtype (grad_output too)."""
    seen = []
    params, inputs = tensors(dtype)

    def forward(p, i):
        seen.append((type(p["w"]), p["w"].dtype, type(i["x"])))
        return Swish.apply(i["x"] @ p["w"])  # an array output: grad_output is drawn

    def backward(p, i, g):
        seen.append((type(p["w"]), p["w"].dtype, type(g)))
        z = i["x"] @ p["w"]
        s = torch.sigmoid(z)
        local = g * (s * (1 + z * (1 - s)))
        return {"w": i["x"].T @ local}

    report = probe(forward, backward, params, {"x": inputs["x"]})
    assert report.ok, report
    assert report.gradient_source == "backward"
    assert all(t is torch.Tensor for entry in seen for t in (entry[0], entry[2]))
    assert {entry[1] for entry in seen} >= {dtype}


def test_mixed_libraries_keep_each_tensor_its_own():
    seen = []

    def forward(p, i):
        seen.append((type(p["w"]), type(i["x"])))
        return float(np.sum(np.tanh(i["x"] @ p["w"].numpy())))

    def backward(p, i):
        t = np.tanh(i["x"] @ p["w"].numpy())
        return {"w": torch.from_numpy(i["x"].T @ (1 - t * t))}  # d tanh = 1 - tanh^2

    report = probe(forward, backward, {"w": torch.tensor(W)}, {"x": X.copy()})
    assert report.ok
    assert set(seen) == {(torch.Tensor, np.ndarray)}


def _state():
    return torch.is_grad_enabled(), torch.get_default_dtype()


@pytest.mark.parametrize("ending", ["pass", "fail", "crash", "interrupt"])
def test_caller_state_is_restored(ending):
    params, inputs = tensors(torch.float64)
    w = params["w"].requires_grad_(True)
    old_grad = torch.full_like(w, 0.5)
    w.grad = old_grad
    before = w.detach().clone()
    calls = [0]

    def forward(p, i):
        calls[0] += 1
        torch.set_default_dtype(torch.float32)  # user code that changes global state
        torch.set_grad_enabled(True)
        if calls[0] > 6 and ending == "crash":
            raise RuntimeError("sensor feed lost")
        if calls[0] > 6 and ending == "interrupt":
            raise KeyboardInterrupt
        return loss_of(SwishWrong if ending == "fail" else Swish)(p, i)

    saved = _state()
    torch.set_grad_enabled(False)
    try:
        check_ending(forward, params, inputs, ending)
        assert not torch.is_grad_enabled()
        assert torch.get_default_dtype() == saved[1]
        assert w.requires_grad and w.grad is old_grad
        assert torch.equal(w.detach(), before)
    finally:
        torch.set_grad_enabled(saved[0])
        torch.set_default_dtype(saved[1])


@pytest.mark.parametrize("autograd", [True, False])
def test_a_forward_that_writes_into_a_tensor_is_an_error(autograd):
    params, inputs = tensors(torch.float64)
    before = params["w"].clone()

    def forward(p, i):
        i["x"].mul_(1.0)  # in place, even if it changes nothing
        return loss_of(Swish)(p, i)

    def backward(p, i):
        return {"w": torch.zeros_like(p["w"])}

    with pytest.raises(InPlaceWriteError, match="writes into the arrays it is given"):
        probe(forward, None if autograd else backward, params, inputs)
    assert torch.equal(params["w"], before)


def test_a_forward_that_leaves_the_graph_is_an_error():
    params, inputs = tensors(torch.float64)

    def forward(p, i):
        z = torch.from_numpy(i["x"].numpy() @ p["w"].numpy())
        return (z * i["c"]).sum()

    with pytest.raises(GraphLeftError, match="leaves torch.s graph"):
        probe(forward, None, params, inputs)


def test_a_numpy_target_still_needs_a_backward():
    with pytest.raises(TargetLoadError, match="no backward function"):
        probe(lambda p, i: float(np.sum(p["w"])), None, {"w": W.copy()})


def test_a_gpu_the_machine_lacks_is_one_sentence(write_target, run_cli):
    if torch.cuda.is_available():
        pytest.skip("this machine has a GPU")
    write_target("""
        import torch
        def setup():
            return {"w": torch.ones(3, device="cuda")}, {}
        def forward(p, i):
            return (p["w"] ** 2).sum()
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert "GPU that this machine does not have" in result.output
    assert "device='cpu'" in result.output


def test_worker_processes_and_json_from_the_command_line(write_target, run_cli):
    write_target("""
        import torch
        class Cube(torch.autograd.Function):
            @staticmethod
            def forward(ctx, z):
                ctx.save_for_backward(z)
                return z ** 3
            @staticmethod
            def backward(ctx, g):
                (z,) = ctx.saved_tensors
                return g * 2 * z * z  # wrong: d z^3 = 3 z^2 (power rule)
        def setup():
            return {"rate": torch.linspace(-1.0, 1.5, 6, dtype=torch.float64)}, {}
        def forward(p, i):
            return Cube.apply(p["rate"]).sum()
    """)
    result = run_cli("check", "case.py", "--jobs", "2", "--json", "out.json")
    assert result.exit_code == 1, result.output
    import json
    from pathlib import Path

    data = json.loads(Path("out.json").read_text())
    assert (data["array_library"], data["gradient_source"]) == ("torch", "autograd")
    rate = data["layers"][0]["tensors"][0]
    assert rate["status"] == "fail" and rate["checked"] == 6
    # analytic 2 z^2 against 3 z^2: a relative error of 1/3 (power rule)
    assert rate["max_rel_error"] == pytest.approx(1 / 3, rel=1e-6)


def _sample(run_cli, name):
    import json

    from conftest import SAMPLES

    result = run_cli("check", str(SAMPLES / name), "--json", "-")
    report = json.loads(result.stdout)
    return result.exit_code, {t["name"]: t["status"] for layer in report["layers"] for t in layer["tensors"]}


def test_wind_power_samples(run_cli):
    """The Function's quotient rule (right) and the same without the square (wrong)."""
    code, statuses = _sample(run_cli, "wind_power_torch.py")
    assert code == 0 and set(statuses.values()) == {"pass"}
    code, statuses = _sample(run_cli, "wind_power_torch_buggy.py")
    assert code == 1
    assert {n for n, s in statuses.items() if s == "fail"} == {"turbine.scale", "speed"}


STACK = '''
import torch
seen = []
class Dense:
    name = "dense"
    def forward(self, p, x, inputs):
        seen.append((type(p["W"]), type(x)))
        return torch.tanh(x @ p["W"] + p["b"])
    def backward(self, p, x, inputs, g):
        seen.append((type(p["W"]), type(x), type(g)))
        t = torch.tanh(x @ p["W"] + p["b"])
        d = g * (1 - t * t) * SLIP  # d tanh = 1 - tanh^2
        return {"W": x.T @ d, "b": d.sum(0)}, d @ p["W"].T
class Loss:
    name = "loss"
    def forward(self, p, x, inputs):
        return 0.5 * ((x - inputs["y"]) ** 2).sum()
    def backward(self, p, x, inputs, g):
        seen.append((type(x),))
        return {}, g * (x - inputs["y"])
layers = [Dense(), Loss()]
def setup():
    g = torch.Generator().manual_seed(1)
    return ({"dense": {"W": torch.randn(3, 2, generator=g, dtype=torch.float64),
                       "b": torch.zeros(2, dtype=torch.float64)}},
            {"x": torch.randn(4, 3, generator=g, dtype=torch.float64),
             "y": torch.randn(4, 2, generator=g, dtype=torch.float64)})
'''


@pytest.mark.parametrize("slip, enters", [(1.0, []), (1.25, ["dense"])])
def test_a_stack_of_torch_layers(slip, enters):
    import types

    from gradprobe.api import probe_target

    module = types.ModuleType("torch_stack_case")
    exec(STACK.replace("SLIP", repr(slip)), module.__dict__)
    report = probe_target(module)
    assert report.ok is (not enters)
    assert list(report.error_enters_at) == enters
    assert report.array_library == "torch"
    assert module.seen and all(t is torch.Tensor for entry in module.seen for t in entry)


def test_leaving_the_graph_is_one_sentence_with_the_fix(write_target, run_cli):
    write_target("""
        import torch
        def setup():
            return {"w": torch.ones(3, dtype=torch.float64)}, {}
        def forward(p, i):
            return float((p["w"].numpy() ** 2).sum())
    """)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert "forward leaves torch's graph" in result.output
    assert "give the target a backward" in result.output
    assert "Traceback" not in result.output


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA GPU on this machine")
def test_tensors_on_a_gpu_stay_there():
    """Runs only where a GPU exists: the code gets its tensors on the GPU; the JSON names it."""
    seen = []
    params, inputs = ({n: t.cuda() for n, t in tree.items()} for tree in tensors(torch.float64))

    def forward(p, i):
        seen.append(p["w"].device.type)
        return loss_of(Swish)(p, i)

    report = probe(forward, None, params, inputs)
    assert report.ok and set(seen) == {"cuda"}
    w = next(t for t in report_dict(report)["layers"][0]["tensors"] if t["name"] == "w")
    assert w["device"].startswith("cuda")


class Arctan(torch.autograd.Function):
    """arctan with its derivative 1 / (1 + z^2) (Abramowitz & Stegun section 4.4, from memory)
    times FACTOR[0], a deliberate relative error."""

    FACTOR = [1.0]

    @staticmethod
    def forward(ctx, z):
        ctx.save_for_backward(z)
        return torch.atan(z)

    @staticmethod
    def backward(ctx, g):
        (z,) = ctx.saved_tensors
        return g / (1 + z ** 2) * Arctan.FACTOR[0]


@pytest.mark.parametrize("n, half_width", [(4, 1.0), (7, 2.5)])
def test_a_bfloat16_rule_at_params_symmetric_about_zero_is_judged_on_its_float64_run(n, half_width):
    """The loss sum(arctan(w)) of w symmetric about 0 cancels along the even moves of the type
    look: the Function's float64 run was taken as narrow, so a rule 25% off was judged on
    bfloat16 itself and came out inconclusive. It computes in float64 and fails there."""
    w = torch.linspace(-half_width, half_width, n, dtype=torch.bfloat16)
    forward = lambda p, i: Arctan.apply(p["w"]).sum()  # noqa: E731
    try:
        Arctan.FACTOR[0] = 1.0
        assert probe(forward, None, {"w": w}, {}).tensor("w").status == "pass"
        Arctan.FACTOR[0] = 1.25
        assert probe(forward, None, {"w": w}, {}).tensor("w").status == "fail"
    finally:
        Arctan.FACTOR[0] = 1.0
