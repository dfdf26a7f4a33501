"""Protocol section 6 read as a user of it: the cases the other framework tests leave out.

Integer tensors beside an autograd-rule target, float16 and array-output Functions, JAX
custom_jvp rules, array-api-strict float32 arrays, kernels that take only their own dtype,
the caller's torch state around a hand-written backward, and the JSON of section 6 from the
command line. Right and wrong are set by closed forms (the power and product rules of any
table of derivatives, named beside each rule).
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from framework_kit import need

from gradprobe.api import probe
from gradprobe.render.json import report_dict

torch = need("torch")
jax = need("jax")
jnp = need("jax.numpy")
xp = need("array_api_strict")

# hourly demand of four shop items (standardised)
DEMAND = np.array([0.6, -1.1, 1.7, 0.3])
ORDERS = np.array([0, 2, 2, 3])  # which item each of four orders asked for


def _cube(slip: float):
    """z^3 as an autograd Function; its backward is slip * 3 z^2 (power rule: d z^3 = 3 z^2)."""

    class Cube(torch.autograd.Function):
        @staticmethod
        def forward(ctx, z):
            ctx.save_for_backward(z)
            return z ** 3

        @staticmethod
        def backward(ctx, g):
            (z,) = ctx.saved_tensors
            return g * (3 * slip) * z * z

    return Cube


def _jvp_rule(slip: float):
    """z sin z as a custom_jvp rule; the tangent is sin z * slip + z cos z (product rule:
    d(z sin z) = sin z + z cos z; slip 0 drops a term)."""

    @jax.custom_jvp
    def wave(z):
        return z * jnp.sin(z)

    @wave.defjvp
    def wave_jvp(primals, tangents):
        (z,), (t,) = primals, tangents
        return wave(z), (slip * jnp.sin(z) + z * jnp.cos(z)) * t

    return wave


def _statuses(report) -> dict[str, str]:
    return {t.name: str(t.status) for t in report.tensors}


@pytest.mark.parametrize("library", ["torch", "jax"])
@pytest.mark.parametrize("slip", [1.0, 1.5])
def test_integer_indices_beside_an_autograd_rule_are_left_alone(library, slip):
    """Integer arrays are never perturbed (section 2) and have no gradient: an autograd-rule
    target with an index tensor in inputs is checked, and the indices reach forward in their
    own library and integer dtype. Closed form: d/dw_k sum_o w_{i_o}^3 = 3 w_k^2 * count_k."""
    seen = []
    if library == "torch":
        cube = _cube(slip)
        params, inputs = {"w": torch.tensor(DEMAND)}, {"orders": torch.tensor(ORDERS)}

        def forward(p, i):
            seen.append((type(i["orders"]), i["orders"].dtype))
            return cube.apply(p["w"][i["orders"]]).sum()
    else:
        rule = _jvp_rule(slip)
        params, inputs = {"w": jnp.asarray(DEMAND, dtype="float32")}, {"orders": jnp.asarray(ORDERS)}

        def forward(p, i):
            seen.append((isinstance(i["orders"], jax.Array), str(i["orders"].dtype)))
            return jnp.sum(rule(p["w"][i["orders"]]))

    report = probe(forward, None, params, inputs)
    assert report.ok is (slip == 1.0), _statuses(report)
    assert [t.name for t in report.tensors] == ["w"]
    if library == "torch":
        assert set(seen) == {(torch.Tensor, torch.int64)}
    else:
        assert {ok for ok, _ in seen} == {True} and {d for _, d in seen} == {"int32"}


@pytest.mark.parametrize("slip", [1.0, 2.0 / 3.0])
def test_a_float16_autograd_function(slip):
    """float16 is one of section 6's dtypes: the right Function passes, 2 z^2 for 3 z^2 fails."""
    w = torch.tensor(DEMAND, dtype=torch.float16)
    report = probe(lambda p, i: _cube(slip).apply(p["w"]).sum(), None, {"w": w})
    assert report.ok is (slip == 1.0)
    tensor = report_dict(report)["layers"][0]["tensors"][0]
    assert tensor["dtype"] == "float16" and "device" not in tensor
    assert w.dtype == torch.float16 and torch.equal(w, torch.tensor(DEMAND, dtype=torch.float16))


@pytest.mark.parametrize("slip", [1.0, 1.2])
def test_an_array_output_autograd_function(slip):
    """forward returns an array and gives no backward: grad_output is drawn and reverse mode
    runs the rule with it; a 20% slip in the rule fails w and the input it flows into."""
    x = torch.tensor(np.outer(DEMAND[:3], DEMAND))  # 3 days x 4 items

    def forward(p, i):
        return _cube(slip).apply(i["x"] * p["w"])

    report = probe(forward, None, {"w": torch.tensor(DEMAND)}, {"x": x})
    assert report.ok is (slip == 1.0)
    assert report.gradient_source == "autograd"
    if slip != 1.0:
        assert _statuses(report) == {"w": "fail", "x": "fail"}


@pytest.mark.parametrize("dtype", ["float64", "float32", "bfloat16"])
@pytest.mark.parametrize("slip", [1.0, 0.0])
def test_custom_jvp_rules(dtype, slip):
    """A JAX custom_jvp rule (section 6 names JVP rules beside VJP ones): right passes, the
    product rule with a term dropped fails, in each dtype, and the code sees the dtype given."""
    with jax.enable_x64(dtype == "float64"):
        w = jnp.asarray(DEMAND, dtype=dtype)
    rule, seen = _jvp_rule(slip), set()

    def forward(p, i):
        seen.add(str(p["w"].dtype))
        return jnp.sum(rule(p["w"]))

    x64 = jax.config.read("jax_enable_x64")
    report = probe(forward, None, {"w": w})
    assert report.ok is (slip == 1.0)
    assert dtype in seen and report.tensors[0].dtype == dtype
    assert not any("no hand-written" in n for n in report.notes)
    assert jax.config.read("jax_enable_x64") == x64


def test_the_64_bit_flag_left_on_stays_on():
    """A caller who runs JAX with x64 on checks a float32 rule: the flag is on afterwards."""
    before = jax.config.read("jax_enable_x64")
    jax.config.update("jax_enable_x64", True)
    try:
        report = probe(lambda p, i: jnp.sum(_jvp_rule(1.0)(p["w"])), None,
                       {"w": jnp.asarray(DEMAND, dtype=jnp.float32)})
        assert report.ok
        assert jax.config.read("jax_enable_x64") is True
    finally:
        jax.config.update("jax_enable_x64", before)


@pytest.mark.parametrize("right", [True, False])
def test_array_api_strict_float32_arrays_and_numpy_gradients(right):
    """float32 array-api-strict arrays reach forward and backward as array-api-strict arrays
    (the caller's float32 among the dtypes seen), backward may return numpy arrays, and an
    array output gets a grad_output of the same library. d sin = cos (any table)."""
    seen = []
    w = xp.asarray(DEMAND, dtype=xp.float32)

    def forward(p, i):
        seen.append((type(p["w"]), p["w"].dtype))
        return xp.sin(p["w"])

    def backward(p, i, g):
        seen.append((type(g), g.dtype))
        slope = np.cos(np.from_dlpack(p["w"])) if right else np.sin(np.from_dlpack(p["w"]))
        return {"w": np.from_dlpack(g) * slope}

    report = probe(forward, backward, {"w": w})
    assert report.ok is right
    data = report_dict(report)
    assert (data["array_library"], data["gradient_source"]) == ("array_api_strict", "backward")
    assert data["layers"][0]["tensors"][0]["dtype"] == "float32"
    assert {kind for kind, _ in seen} == {type(w)}
    assert xp.float32 in {dtype for _, dtype in seen}
    assert w.dtype == xp.float32 and np.array_equal(np.from_dlpack(w), DEMAND.astype(np.float32))


@pytest.mark.parametrize("library", ["torch", "array_api_strict"])
@pytest.mark.parametrize("right", [True, False])
def test_a_kernel_that_takes_only_its_own_dtype(library, right):
    """Code that refuses any dtype but the float32 it was given cannot run wider: it is judged
    on float32 arithmetic, never a crash, and only ever sees float32.
    d(z sin z) = sin z + z cos z (product rule)."""
    if library == "torch":
        ns, w, f32 = torch, torch.tensor(DEMAND, dtype=torch.float32), torch.float32
    else:
        ns, w, f32 = xp, xp.asarray(DEMAND, dtype=xp.float32), xp.float32

    def own(z):
        if z.dtype != f32:
            raise TypeError("this kernel is float32 only")
        return z

    def forward(p, i):
        z = own(p["w"])
        return ns.sum(z * ns.sin(z))

    def backward(p, i):
        z = own(p["w"])
        return {"w": (ns.sin(z) if right else 0.0) + z * ns.cos(z)}

    report = probe(forward, backward, {"w": w})
    assert report.ok is right
    assert report.compute_dtype == "float32"


def _torch_state():
    return torch.is_grad_enabled(), torch.get_default_dtype()


@pytest.mark.parametrize("ending", ["pass", "fail", "forward crash", "backward crash", "interrupt"])
@pytest.mark.parametrize("grad_mode", [True, False])
def test_torch_state_around_a_hand_written_backward(ending, grad_mode):
    """Section 6's state rule holds for a target with its own backward too, whichever way
    the check ends, even when the user's code changes the global state itself."""
    w = torch.tensor(DEMAND, requires_grad=True)
    held = torch.full_like(w, 0.25)
    w.grad = held
    x = torch.tensor(DEMAND[::-1].copy())
    calls = [0]

    def forward(p, i):
        calls[0] += 1
        torch.set_default_dtype(torch.float64)
        torch.set_grad_enabled(not grad_mode)
        if calls[0] > 3 and ending in ("forward crash", "interrupt"):
            raise KeyboardInterrupt if ending == "interrupt" else RuntimeError("till offline")
        return (torch.sin(p["w"]) * i["x"]).sum()

    def backward(p, i):
        if ending == "backward crash":
            raise RuntimeError("till offline")
        slope = torch.cos(p["w"]) if ending != "fail" else -torch.cos(p["w"])  # d sin = cos
        return {"w": slope * i["x"]}

    saved = _torch_state()
    torch.set_grad_enabled(grad_mode)
    try:
        if ending in ("pass", "fail"):
            assert probe(forward, backward, {"w": w}, {"x": x}).ok is (ending == "pass")
        else:
            with pytest.raises(KeyboardInterrupt if ending == "interrupt" else Exception):
                probe(forward, backward, {"w": w}, {"x": x})
        assert _torch_state() == (grad_mode, saved[1])
        assert w.requires_grad and w.grad is held and not x.requires_grad and x.grad is None
        assert torch.equal(w.detach(), torch.tensor(DEMAND))
    finally:
        torch.set_grad_enabled(saved[0])
        torch.set_default_dtype(saved[1])


def test_a_tensor_inside_a_graph_is_checked_without_warnings():
    """A caller's tensor that is itself the result of torch operations (not a leaf) is
    checked, left out of the caller's graph, and no warning about reading its .grad leaks."""
    base = torch.tensor(DEMAND, requires_grad=True)
    w = base * 2
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report = probe(lambda p, i: _cube(1.0).apply(p["w"]).sum(), None, {"w": w})
    assert report.ok
    assert base.grad is None and w.grad_fn is not None


CLI_JAX = """
import jax, jax.numpy as jnp
SLIP = {slip}
@jax.custom_vjp
def soft(z):
    return jnp.logaddexp(z, 0.0)
def soft_fwd(z):
    return soft(z), z
def soft_bwd(z, g):
    return (g * jax.nn.sigmoid(z) * SLIP,)  # d softplus = sigmoid
soft.defvjp(soft_fwd, soft_bwd)
def setup():
    return {{"yield": jnp.asarray([0.4, -0.9, 1.3], dtype=jnp.bfloat16)}}, {{}}
def forward(p, i):
    return jnp.sum(soft(p["yield"]) ** 2)
"""


@pytest.mark.parametrize("slip, code", [(1.0, 0), (1.5, 1)])
def test_section_6_keys_from_the_command_line(write_target, run_cli, slip, code):
    """A bfloat16 custom_vjp target of crop yields: exit 0 right, 1 wrong; the JSON carries
    array_library, gradient_source and the library's dtype name, and no device on the CPU."""
    write_target(CLI_JAX.format(slip=slip))
    result = run_cli("check", "case.py", "--json", "-")
    assert result.exit_code == code, result.output
    data = json.loads(result.stdout)
    assert (data["array_library"], data["gradient_source"]) == ("jax", "autograd")
    tensor = data["layers"][0]["tensors"][0]
    assert (tensor["name"], tensor["dtype"], tensor["status"]) == ("yield", "bfloat16", "pass" if code == 0 else "fail")
    assert "device" not in tensor


def test_a_numpy_target_reports_numpy_and_backward(run_cli):
    from conftest import SAMPLES

    data = json.loads(run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--json", "-").stdout)
    assert (data["array_library"], data["gradient_source"]) == ("numpy", "backward")


@pytest.mark.parametrize("source, words", [
    ("""
        import torch
        def setup():
            return {"w": torch.linspace(-1, 1, 4, dtype=torch.float64)}, {}
        def forward(p, i):
            return (p["w"] ** 2).sum()
        def backward(p, i):
            p["w"].mul_(2.0)
            return {"w": p["w"]}
     """, "backward writes into the arrays it is given"),
    ("""
        import torch
        class Scale(torch.autograd.Function):
            @staticmethod
            def forward(ctx, z):
                return 2 * z
            @staticmethod
            def backward(ctx, g):
                raise ValueError("kernel not built for this shape")
        def setup():
            return {"w": torch.linspace(-1, 1, 4, dtype=torch.float64)}, {}
        def forward(p, i):
            return Scale.apply(p["w"]).sum()
     """, "a hand-written rule's backward on its path, raised ValueError: kernel not built"),
    ("""
        import torch
        def setup():
            return {"w": torch.linspace(-1, 1, 4, dtype=torch.float64)}, {}
        def forward(p, i):
            return (p["w"] ** 2).sum()
        def backward(p, i):
            return [2 * p["w"]]
     """, "backward must return a mapping of name -> gradient, not a list; return a dict"),
], ids=["backward writes", "rule raises", "backward not a mapping"])
def test_framework_errors_are_one_sentence_and_exit_2(write_target, run_cli, source, words):
    write_target(source)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert words in result.output and "case.py:" in result.output
    assert "Traceback" not in result.output and "forward must return" not in result.output
    assert len([line for line in result.output.splitlines() if line.startswith("gradprobe: error")]) == 1


@pytest.mark.parametrize("library, second", [("torch", False), ("jax", False), ("torch", True)])
def test_evaluations_count_every_call_of_forward(library, second):
    """Section 4: summary.evaluations is how many times forward was called, the calls the
    framework's reverse mode (and double backward, with second_order = True) makes included."""
    import types

    from gradprobe.api import probe_target

    calls = [0]
    target = types.ModuleType("till_case")
    if library == "torch":
        target.params = {"w": torch.tensor(DEMAND)}

        def forward(p, i):
            calls[0] += 1
            return (torch.sin(p["w"]) * p["w"]).sum()
    else:
        target.params = {"w": jnp.asarray(DEMAND, dtype=jnp.float32)}

        def forward(p, i):
            calls[0] += 1
            return jnp.sum(_jvp_rule(1.0)(p["w"]))

    target.forward = forward
    if second:
        target.second_order = True
    report = probe_target(target)
    assert report.ok and (report.second_order is not None) is second
    assert report.evaluations == calls[0]


class _TorchDense:
    """A class-style dense layer holding torch tensors; it counts its calls in a tensor it
    writes in place (state, like a running statistic). Input gradient g W^T times ``slip``
    (d(x W + b)/dx = W^T: 1 is right)."""

    def __init__(self, seed: int, n_in: int, n_out: int, slip: float = 1.0, bias_slip: float = 1.0):
        g = torch.Generator().manual_seed(seed)
        self.W = 0.5 * torch.randn(n_in, n_out, generator=g, dtype=torch.float64)
        self.b = torch.zeros(n_out, dtype=torch.float64)
        self.calls = torch.zeros(1, dtype=torch.float64)
        self.slip, self.bias_slip = slip, bias_slip

    def forward(self, x):
        assert isinstance(x, torch.Tensor) and isinstance(self.W, torch.Tensor), type(x)
        self.calls.add_(1.0)
        self.x = x
        return x @ self.W + self.b

    def backward(self, g):
        assert isinstance(g, torch.Tensor), type(g)
        self.dW, self.db = self.x.T @ g, g.sum(0) * self.bias_slip
        return (g @ self.W.T) * self.slip


class _TorchTanh:
    def forward(self, x):
        self.out = torch.tanh(x)
        return self.out

    def backward(self, g):
        return g * (1 - self.out ** 2)  # d tanh = 1 - tanh^2


class _TorchSquaredError:
    def forward(self, scores, target):
        self.gap = scores - target
        return 0.5 * (self.gap ** 2).sum()

    def backward(self):
        return self.gap


SHOPS = torch.tensor(np.random.default_rng(5).normal(size=(6, 3)))  # 6 shops, 3 features
SALES = torch.tensor(np.random.default_rng(6).normal(size=(6, 2)))  # 2 products


def _left_as_it_was(layer, kept):
    assert layer.W is kept["W"] and torch.equal(layer.W, kept["W_values"])
    assert torch.equal(layer.calls, kept["calls"]) and not hasattr(layer, "x")


def _kept(layer):
    return {"W": layer.W, "W_values": layer.W.clone(), "calls": layer.calls.clone()}


@pytest.mark.parametrize("bias_slip", [1.0, 2.0])
def test_a_class_style_torch_layer_through_the_adapter(bias_slip):
    """Section 5's adapter with section 6's arrays: the layer runs on torch tensors, its
    stored gradients are read, and it is left as it was (its in-place counter included)."""
    from gradprobe import layer_target, probe_target

    layer = _TorchDense(1, 3, 2, bias_slip=bias_slip)
    kept = _kept(layer)
    report = probe_target(layer_target(layer, SHOPS, {"W": "dW", "b": "db"}))
    assert report.ok is (bias_slip == 1.0)
    assert report.array_library == "torch"
    assert {n for n, s in _statuses(report).items() if s == "fail"} == (set() if bias_slip == 1.0 else {"_TorchDense.b"})
    _left_as_it_was(layer, kept)


@pytest.mark.parametrize("slip, enters", [(1.0, []), (1.3, ["_TorchDense2"])])
def test_a_class_style_torch_object_stack(slip, enters):
    """A stack of class-style torch layers and a loss object: a 30% slip in the second dense
    layer's input gradient enters there; the layers are left as they were."""
    from gradprobe import probe_target
    from gradprobe.targets.object_stack import object_stack

    layers = [_TorchDense(1, 3, 4), _TorchTanh(), _TorchDense(2, 4, 2, slip=slip)]
    kept = _kept(layers[0])
    report = probe_target(object_stack(layers, _TorchSquaredError(), SHOPS, SALES))
    assert report.ok is (slip == 1.0)
    assert list(report.error_enters_at) == enters and report.array_library == "torch"
    _left_as_it_was(layers[0], kept)


@pytest.mark.parametrize("right", [True, False])
def test_a_torch_backward_that_returns_bfloat16_whatever_it_is_given(right):
    """A hand-written backward that casts its result to torch.bfloat16 (not to the params'
    dtype) has no float64 run: the right one passes within bfloat16's rounding (it was a
    false alarm), the wrong one fails. d sin = cos (any table); sin in its place is wrong."""
    w = torch.tensor([0.4, -0.9, 1.3, 0.2], dtype=torch.bfloat16)  # growth rates of four plots

    def backward(p, i):
        return {"w": (torch.cos if right else torch.sin)(p["w"].double()).to(torch.bfloat16)}

    report = probe(lambda p, i: torch.sin(p["w"].double()).sum(), backward, {"w": w})
    assert report.ok is right
