"""Stacks: each layer's backward checked on its own, where the error enters, inheritance."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from stack_layers import Dense, Rectify, ChoiceLoss, SquaredLoss, Tanh, arrays

from gradprobe import probe, probe_stack, report_dict
from gradprobe.common.errors import BadOutputError, TargetLoadError, UserCodeError
from gradprobe.targets.stack import stack
from gradprobe.targets.stack_split import base_activations, layer_targets

THREE = ("d1", "d2", "d3")


def _three(slips=(None, None, None)):
    params, inputs = arrays(widths=(3, 4, 4, 2), names=THREE)
    layers = [Dense("d1", slips[0]), Tanh("t1"), Dense("d2", slips[1]), Tanh("t2"),
              Dense("d3", slips[2]), SquaredLoss()]
    return layers, params, inputs


def _fails(report):
    return {t.name: t.inherited_from for t in report.failing_tensors}


def test_a_correct_stack_passes_every_layer_on_its_own():
    report = probe_stack(*_three())
    assert report.ok and report.error_enters_at == ()
    assert [(layer.name, layer.own) for layer in report.layers] == [
        ("d1", "pass"), ("t1", "pass"), ("d2", "pass"), ("t2", "pass"), ("d3", "pass"),
        ("loss", "pass"), ("inputs", None)]


def test_a_wrong_input_gradient_is_named_and_earlier_failures_inherited():
    report = probe_stack(*_three((None, "input", None)))
    assert not report.ok and report.error_enters_at == ("d2",)
    d2 = next(layer for layer in report.layers if layer.name == "d2")
    assert d2.input_gradient_wrong and d2.wrong_param_gradients == ()
    assert "3 x numeric" in d2.own_tensors[-1].hint
    # end to end, d2's own params are right; the layers before it fail, inherited from it
    assert _fails(report) == {"d1.W": "d2", "d1.b": "d2", "x": "d2"}


def test_a_wrong_parameter_gradient_fails_its_own_tensor_and_nothing_is_inherited():
    report = probe_stack(*_three((None, "param", None)))
    assert report.error_enters_at == ("d2",)
    d2 = next(layer for layer in report.layers if layer.name == "d2")
    assert not d2.input_gradient_wrong and [t.name for t in d2.wrong_param_gradients] == ["d2.W"]
    assert _fails(report) == {"d2.W": None}


def test_two_wrong_layers_are_both_named_and_inheritance_points_to_the_nearest():
    report = probe_stack(*_three(("param", None, "input")))
    assert report.error_enters_at == ("d1", "d3")
    fails = _fails(report)
    assert fails["d2.W"] == fails["d2.b"] == "d3"
    assert fails["d1.W"] is None  # its own layer is wrong: no inheritance key (protocol)
    assert fails["x"] == "d3"


def test_a_layer_without_params_has_a_verdict_and_no_tensors():
    report = probe_stack(*_three())
    t1 = next(layer for layer in report.layers if layer.name == "t1")
    assert t1.tensors == () and t1.own == "pass"
    assert [(t.name, t.kind) for t in t1.own_tensors] == [("t1.x", "input")]


def test_relu_exactly_at_its_kink_is_a_kink_not_a_bug():
    params, inputs = arrays(widths=(3, 4, 2))
    inputs["x"][0] = 0.0  # shop 0 reports nothing: every pre-activation of row 0 is the bias
    params["d1"]["b"][1] = 0.0  # ... and unit 1's bias is 0: exactly at the ReLU kink
    report = probe_stack([Dense("d1"), Rectify(), Dense("d2"), SquaredLoss()], params, inputs)
    assert report.ok and report.error_enters_at == ()
    relu = next(layer for layer in report.layers if layer.name == "relu")
    assert relu.own == "kink" and relu.own_tensors[0].kink_indices == ((0, 1),)


def test_a_loss_with_integer_labels_keeps_them_unperturbed():
    params, inputs = arrays(widths=(4, 3), batch=6)
    labels = np.array([0, 2, 1, 1, 0, 2])
    inputs = {"x": inputs["x"], "labels": labels}
    report = probe_stack([Dense("d1"), ChoiceLoss()], params, inputs)
    assert report.ok and report.error_enters_at == ()
    assert {t.name for t in report.tensors} == {"d1.W", "d1.b", "x"}
    assert labels.tolist() == [0, 2, 1, 1, 0, 2]


def test_each_layer_is_checked_at_the_activation_that_reaches_it():
    layers, params, inputs = _three()
    st = stack(layers, params, inputs)
    parts = layer_targets(st, base_activations(st))
    expected = np.tanh(inputs["x"] @ params["d1"]["W"] + params["d1"]["b"])
    assert np.array_equal(parts[2].target.params["d2"]["x"], expected)
    assert parts[2].input_name == "d2.x"


def test_the_stack_costs_more_evaluations_than_the_flat_network_but_agrees_with_it():
    layers, params, inputs = _three((None, "input", None))
    st = stack(layers, params, inputs)
    from gradprobe.targets.stack import end_to_end

    flat = end_to_end(st)
    alone = probe(flat.forward, flat.backward, params, inputs)
    both = probe_stack(layers, params, inputs)
    assert {t.name for t in alone.failing_tensors} == {t.name for t in both.failing_tensors}
    assert both.evaluations == alone.evaluations + both.own_evaluations


def test_user_arrays_are_unchanged():
    layers, params, inputs = _three((None, "input", None))
    before = {k: v.tobytes() for k, v in {**params["d1"], **inputs}.items()}
    probe_stack(layers, params, inputs)
    assert before == {k: v.tobytes() for k, v in {**params["d1"], **inputs}.items()}


def test_bad_stacks_are_one_sentence():
    params, inputs = arrays()
    with pytest.raises(TargetLoadError, match="layer 0 of the stack has no name"):
        stack([object()], params, inputs)
    with pytest.raises(TargetLoadError, match="'d9', which is not a layer"):
        stack([Dense("d1"), SquaredLoss()], {"d9": {}}, inputs)
    with pytest.raises(TargetLoadError, match="inputs must hold x"):
        stack([Dense("d1"), SquaredLoss()], params, {"y": inputs["y"]})
    with pytest.raises(BadOutputError, match="last layer, d2, must return the scalar loss"):
        probe_stack([Dense("d1"), Dense("d2")], params, inputs)


def test_a_layer_that_raises_is_named():
    class Broken(Dense):
        def backward(self, p, x, inputs, g):
            raise ValueError("shapes do not align")

    class Refuses(Dense):
        def forward(self, p, x, inputs):
            raise KeyError("demand")

    params, inputs = arrays()
    with pytest.raises(UserCodeError, match="layer d2's backward raised ValueError: shapes"):
        probe_stack([Dense("d1"), Broken("d2"), SquaredLoss()], params, inputs)
    with pytest.raises(UserCodeError, match="<stack>: layer d2's forward raised KeyError: 'demand'"):
        probe_stack([Dense("d1"), Refuses("d2"), SquaredLoss()], params, inputs)


def test_a_misshaped_input_gradient_fails_its_layer_and_the_earlier_ones_inherit():
    class Misshaped(Dense):
        def backward(self, p, x, inputs, g):
            grads, gx = super().backward(p, x, inputs, g)
            return grads, gx.T

    params, inputs = arrays()
    report = probe_stack([Dense("d1"), Misshaped("d2"), SquaredLoss()], params, inputs)
    assert report.error_enters_at == ("d2",)
    assert _fails(report) == {"d1.W": "d2", "d1.b": "d2"}


def test_json_keys_for_stacks_and_for_flat_targets():
    d = report_dict(probe_stack(*_three((None, "input", None))))
    assert d["summary"]["error_enters_at"] == ["d2"] and d["summary"]["own_evaluations"] > 0
    layers = {layer["name"]: layer for layer in d["layers"]}
    assert layers["d2"]["own"] == "fail" and layers["d1"]["own"] == "pass"
    assert layers["d2"]["own_check"]["input_gradient_wrong"] is True
    d1 = {t["name"]: t for t in layers["d1"]["tensors"]}
    assert d1["d1.W"]["inherited_from"] == "d2"
    assert "inherited_from" not in {k for t in layers["d2"]["tensors"] for k in t}
    json.dumps(d)
    params, inputs = arrays(widths=(3, 2), names=("d1",))
    flat = report_dict(probe(lambda p, i: float(np.sum(i["x"] @ p["d1"]["W"])),
                             lambda p, i: {"d1": {"W": i["x"].sum(axis=0)[:, None] * np.ones((1, 2)),
                                                  "b": np.zeros(2)}}, params, inputs))
    assert flat["summary"]["error_enters_at"] is None
    assert all(layer["own"] is None and layer["own_check"] is None for layer in flat["layers"])


def test_stack_starter_runs_and_a_slip_in_it_is_found(run_cli, tmp_path):
    assert run_cli("starter", "net.py", "--stack").exit_code == 0
    path = tmp_path / "net.py"
    assert "layers = [" in path.read_text()
    assert run_cli("check", "net.py", "-q").exit_code == 0
    path.write_text(path.read_text().replace("grad_y / (1.0 + np.exp(-x))", "grad_y"))
    result = run_cli("check", "net.py", "--json", "-")
    assert result.exit_code == 1
    assert json.loads(result.stdout)["summary"]["error_enters_at"] == ["softplus"]


def test_the_fixture_checks_stacks(pytester):
    pytester.syspathinsert(Path(__file__).parent)
    pytester.makepyfile(test_net="""
        from stack_layers import Dense, SquaredLoss, Tanh, arrays

        def test_ok(grad_probe):
            params, inputs = arrays()
            report = grad_probe.stack([Dense("d1"), Tanh(), Dense("d2"), SquaredLoss()], params, inputs)
            assert report.error_enters_at == ()

        def test_wrong(grad_probe):
            params, inputs = arrays()
            grad_probe.stack([Dense("d1"), Tanh(), Dense("d2", "input"), SquaredLoss()], params, inputs)
    """)
    result = pytester.runpytest_inprocess("-q", "-p", "no:cacheprovider")
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*error enters at d2: its input gradient is wrong*"])


def test_float32_sampling_and_directions_apply_to_every_check():
    layers, params, inputs = _three((None, "input", None))
    params32 = {n: {k: v.astype(np.float32) for k, v in p.items()} for n, p in params.items()}
    inputs32 = {k: v.astype(np.float32) for k, v in inputs.items()}
    report = probe_stack(layers, params32, inputs32, sample=3, directions=2)
    # float32 layers that run in float64 too are checked on that run (threshold 1e-6)
    assert report.threshold == 1e-6 and report.compute_dtype == "float32"
    assert report.error_enters_at == ("d2",)
    d1, d2 = report.layers[0], report.layers[2]
    assert all(t.checked == 3 and len(t.directions) == 2 for t in [*d1.own_tensors, *d2.tensors])
    assert d2.input_gradient_wrong and len(d2.own_tensors[-1].directions) == 2
    assert {t.inherited_from for t in report.failing_tensors} == {"d2"}


def test_an_embedding_of_integer_indices_as_the_first_layer():
    class Embed:
        name = "embed"

        def forward(self, p, x, inputs):
            return p["E"][x]

        def backward(self, p, x, inputs, g):
            grad = np.zeros_like(p["E"])
            np.add.at(grad, x, g)
            return {"E": grad}, None  # no gradient for integer indices

    rng = np.random.default_rng(2)
    params = {"embed": {"E": rng.normal(size=(6, 3))}, "d1": {"W": rng.normal(size=(3, 2)),
                                                           "b": np.zeros(2)}}
    inputs = {"x": np.array([0, 3, 3, 5]), "y": rng.normal(size=(4, 2))}
    report = probe_stack([Embed(), Dense("d1"), SquaredLoss()], params, inputs)
    assert report.ok and {t.name for t in report.tensors} == {"embed.E", "d1.W", "d1.b"}
    embed = report.layers[0]
    assert embed.own == "pass" and [t.name for t in embed.own_tensors] == ["embed.E"]


def test_the_verdict_names_a_layer_wrong_on_its_own_when_nothing_fails_end_to_end():
    from gradprobe.render.terminal import stack_line, verdict
    from gradprobe.report.model import LayerResult, Report, TensorResult

    wrong = TensorResult("d1.x", "d1", "input", (2,), "float64", 2, 2, 0, "fail")
    report = Report("net", 1e-6, 0, (LayerResult("d1", (), own="fail", own_tensors=(wrong,),
                                                 own_input="d1.x"),),
                    10, 0.0, error_enters_at=("d1",))
    assert not report.ok
    assert verdict(report).startswith("DISAGREES · the own backward of d1 is wrong")
    assert stack_line(report) == "error enters at d1: its input gradient is wrong"
