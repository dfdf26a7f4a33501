"""The target protocol read as a contract, for the rules no other test states on its own:
a stack given as a mapping of layers with a module among them (section 5), each dtype's
documented default threshold (section 6), and one sentence with its own fix for every
result of the user's code that gradprobe cannot use (section 3).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from gradprobe.api import probe

SCALE_LAYER = """
import numpy as np
SLIP = {slip}
def forward(p, x, inputs):
    return np.exp(x * p["k"])
def backward(p, x, inputs, g):
    e = np.exp(x * p["k"])  # d exp(u) = exp(u) (any table of derivatives)
    return {{"k": np.sum(g * e * x, axis=0)}}, g * e * p["k"] * SLIP
"""

MAPPING_STACK = """
import numpy as np
import SCALE_MODULE as shelf_scale
class Dense:
    def forward(self, p, x, inputs):
        return x @ p["W"]
    def backward(self, p, x, inputs, g):
        return {"W": x.T @ g}, g @ p["W"].T
class SquaredError:
    def forward(self, p, x, inputs):
        return float(0.5 * np.sum((x - inputs["y"]) ** 2))
    def backward(self, p, x, inputs, g):
        assert float(g) == 1.0, "the last layer's grad_y is 1.0"
        return {}, g * (x - inputs["y"])
layers = {"dense": Dense(), "scale": shelf_scale, "loss": SquaredError()}
def setup():
    r = np.random.default_rng(4)  # weekly shelf demand of 5 shops, 3 features, 2 products
    return ({"dense": {"W": 0.5 * r.normal(size=(3, 2))}, "scale": {"k": np.array([0.7, -0.4])}},
            {"x": r.normal(size=(5, 3)), "y": r.normal(size=(5, 2))})
"""


@pytest.mark.parametrize("slip, code", [(1.0, 0), (1.5, 1)])
def test_a_stack_given_as_a_mapping_with_a_module_layer(write_target, run_cli, slip, code):
    """Section 5: layers may be a mapping name -> layer, a layer may be a module and needs no
    name of its own, a layer without params is absent from params, the last layer's grad_y
    is 1.0. A 50% slip in the module's input gradient enters at 'scale'; the earlier dense
    layer and the input inherit it."""
    module = f"shelf_scale_{code}"  # a name of its own: the module stays imported after the run
    write_target(SCALE_LAYER.format(slip=slip), f"{module}.py")
    write_target(MAPPING_STACK.replace("SCALE_MODULE", module), "shelf_stack.py")
    result = run_cli("check", "shelf_stack.py", "--json", "-")
    assert result.exit_code == code, result.output
    data = json.loads(result.stdout)
    layers = {layer["name"]: layer for layer in data["layers"]}
    assert list(layers)[:3] == ["dense", "scale", "loss"]
    tensors = {t["name"]: t for layer in data["layers"] for t in layer["tensors"]}
    if slip == 1.0:
        assert data["summary"]["error_enters_at"] == []
        assert {layers[n]["own"] for n in ("dense", "scale", "loss")} == {"pass"}
        assert all("inherited_from" not in t for t in tensors.values())
    else:
        assert data["summary"]["error_enters_at"] == ["scale"]
        assert (layers["scale"]["own"], layers["dense"]["own"]) == ("fail", "pass")
        assert tensors["dense.W"]["inherited_from"] == "scale" and tensors["x"]["inherited_from"] == "scale"
        assert tensors["scale.k"]["status"] == "pass" and "inherited_from" not in tensors["scale.k"]


# unit roundoff u = 2**-p of a p-bit significand (IEEE 754 binary32: 24, binary16: 11;
# bfloat16: 8), the default threshold 2 sqrt(u) (common practice: the square root of the
# precision is the best a first-order difference quotient resolves)
DEFAULTS = {"float32": (24, "4.9e-4"), "float16": (11, "0.044"), "bfloat16": (8, "0.12")}


@pytest.mark.parametrize("dtype", list(DEFAULTS))
def test_each_dtype_has_its_documented_default_threshold(dtype, run_cli):
    """Section 6: 'Each has a documented default threshold' - the --help text names it, and
    code that can only run in that dtype is judged with it. d(z sin z) = sin z + z cos z."""
    torch = pytest.importorskip("torch")
    bits, shown = DEFAULTS[dtype]
    kind = getattr(torch, dtype)

    def forward(p, i):
        assert p["w"].dtype == kind  # this kernel runs in its own dtype only
        return (p["w"] * torch.sin(p["w"])).sum()

    def backward(p, i):
        z = p["w"]
        return {"w": torch.sin(z) + z * torch.cos(z)}

    report = probe(forward, backward, {"w": torch.tensor([0.6, -1.1, 1.7, 0.3], dtype=kind)})
    assert report.ok and report.compute_dtype == dtype
    assert report.threshold == pytest.approx(2 * math.sqrt(2.0 ** -bits), rel=0.05)
    help_text = " ".join(run_cli("check", "--help").output.split())
    assert f"{dtype} {shown}" in help_text


BAD_RESULTS = {
    "hvp not a mapping": ("""
        import numpy as np
        params = {"w": np.array([0.5, -1.0])}
        def forward(p, i): return float(np.sum(np.exp(p["w"])))
        def backward(p, i): return {"w": np.exp(p["w"])}
        def hvp(p, i, v): return [np.exp(p["w"]) * v["w"]]
     """, "hvp must return a mapping nested like the params, not a list; return H v as a dict"),
    "hessian not square": ("""
        import numpy as np
        params = {"w": np.array([0.5, -1.0])}
        def forward(p, i): return float(np.sum(np.exp(p["w"])))
        def backward(p, i): return {"w": np.exp(p["w"])}
        def hessian(p, i): return np.diag(np.exp(p["w"]))[:1]
     """, "hessian returned shape (1, 2), but the params have 2 floating-point elements, so it must be (2, 2)"),
    "layer backward not a pair": ("""
        import numpy as np
        class Square:
            name = "square"
            def forward(self, p, x, inputs): return float(np.sum(p["a"] * x ** 2))
            def backward(self, p, x, inputs, g): return [g * x ** 2]
        layers = [Square()]
        def setup(): return {"square": {"a": np.array([0.5, 2.0])}}, {"x": np.array([1.0, -3.0])}
     """, "layer square's backward must return (grads, grad_x) but returned list; return the pair"),
    "backward returns None": ("""
        import numpy as np
        params = {"w": np.array([0.5, -1.0])}
        def forward(p, i): return float(np.sum(np.exp(p["w"])))
        def backward(p, i): np.exp(p["w"])
     """, "backward must return a mapping of name -> gradient, not None; return a dict nested like params"),
}


@pytest.mark.parametrize("case", list(BAD_RESULTS))
def test_an_unusable_result_is_one_sentence_about_that_function(case, write_target, run_cli):
    """Section 3: exit 2, one sentence naming the target and what is wrong, with the fix for
    the function at fault (never the advice meant for forward's result), no traceback."""
    source, words = BAD_RESULTS[case]
    write_target(source)
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    errors = [line for line in result.output.splitlines() if line.startswith("gradprobe: error: case.py: ")]
    assert len(errors) == 1 and words in errors[0], result.output
    assert errors[0].endswith(".")
    assert "forward must return" not in result.output and "Traceback" not in result.output


@pytest.mark.parametrize("narrow", ["bfloat16", "float16"])
@pytest.mark.parametrize("right", [True, False])
def test_a_backward_that_returns_its_gradient_in_a_fixed_narrow_type(narrow, right):
    """Section 6 (ml_dtypes.bfloat16 in numpy arrays, numpy float16): a backward that always
    rounds its result to the 16-bit type (written as that type, not as the params' dtype)
    has no float64 run to compare with; the right one passes within its rounding, the wrong
    one fails. d sin = cos (any table of derivatives); sin in its place is wrong."""
    from framework_kit import need

    kind = np.dtype(need("ml_dtypes").bfloat16) if narrow == "bfloat16" else np.dtype(np.float16)
    rates = np.array([0.4, -0.9, 1.3, 0.2], dtype=kind)  # growth rates of four crop plots

    def forward(p, i):
        return float(np.sum(np.sin(p["rate"].astype(np.float64))))

    def backward(p, i):
        slope = np.cos if right else np.sin
        return {"rate": slope(p["rate"].astype(np.float64)).astype(kind)}

    report = probe(forward, backward, {"rate": rates})
    assert report.ok is right, [(t.name, str(t.status), t.max_rel_error) for t in report.tensors]
    assert report.tensors[0].dtype == narrow


BF16_STACK = '''
import numpy as np
import ml_dtypes
bf = ml_dtypes.bfloat16
class Scale:
    name = "scale"
    def forward(self, p, x, inputs):
        return (x.astype(np.float64) * p["k"].astype(np.float64)).astype(bf)
    def backward(self, p, x, inputs, g):
        g = np.asarray(g, dtype=np.float64)  # d(k x)/dx = k, d(k x)/dk = x
        return ({"k": (g * x.astype(np.float64)).sum(0).astype(bf)},
                (g * p["k"].astype(np.float64) * SLIP).astype(bf))
class SquaredError:
    name = "loss"
    def forward(self, p, x, inputs):
        return float(0.5 * np.sum(x.astype(np.float64) ** 2))
    def backward(self, p, x, inputs, g):
        return {}, (g * x.astype(np.float64)).astype(bf)
layers = [Scale(), SquaredError()]
def setup():  # two sensors' readings, scaled per sensor
    return ({"scale": {"k": np.array([0.7, -0.4], dtype=bf)}},
            {"x": np.array([[0.5, 1.5], [-1.0, 0.25]], dtype=bf)})
'''


@pytest.mark.parametrize("slip", [1.0, 1.5])
def test_a_stack_of_bfloat16_numpy_arrays_checks_its_input_gradients(slip):
    """Sections 5 and 6: in a stack whose activations are ml_dtypes.bfloat16 arrays, the
    input gradient of each layer is checked (it was left out, the arrays not being taken for
    floating point); a 50% slip in it enters at 'scale', the right one fails nothing."""
    import types

    from framework_kit import need

    from gradprobe.api import probe_target

    need("ml_dtypes")
    module = types.ModuleType("sensor_stack_case")
    exec(BF16_STACK.replace("SLIP", repr(slip)), module.__dict__)
    report = probe_target(module)
    assert "x" in {t.name for t in report.tensors}
    assert report.ok is (slip == 1.0)
    assert list(report.error_enters_at) == ([] if slip == 1.0 else ["scale"])


def test_an_hvp_in_bfloat16_numpy_arrays_is_read():
    """Sections 6 and 7: an hvp returning ml_dtypes.bfloat16 arrays for bfloat16 params is
    read and judged (it was refused as 'shape (3,) ... whose shape is (3,)', a false alarm).
    d^2/dw^2 exp(w) = exp(w) (any table of derivatives): the right hvp passes."""
    import types

    from framework_kit import need

    from gradprobe.api import probe_target

    bf = need("ml_dtypes").bfloat16
    target = types.ModuleType("growth_case")
    target.params = {"w": np.array([0.5, -1.0, 0.3], dtype=bf)}  # log growth of three herds
    target.forward = lambda p, i: float(np.sum(np.exp(p["w"].astype(np.float64))))
    target.backward = lambda p, i: {"w": np.exp(p["w"].astype(np.float64)).astype(bf)}
    target.hvp = lambda p, i, v: {"w": (np.exp(p["w"].astype(np.float64))
                                        * np.asarray(v["w"], dtype=np.float64)).astype(bf)}
    report = probe_target(target)
    assert report.ok and report.second_order.status == "pass"
