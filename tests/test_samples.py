"""Each sample's documented verdict."""

from __future__ import annotations

import json

from conftest import SAMPLES


def _json(run_cli, name):
    result = run_cli("check", str(SAMPLES / name), "--json", "-")
    return result.exit_code, json.loads(result.stdout)


def test_correct_network_passes_with_kinks(run_cli):
    code, report = _json(run_cli, "crop_yield.py")
    assert code == 0 and report["ok"]
    tensors = {t["name"]: t for layer in report["layers"] for t in layer["tensors"]}
    assert {n for n, t in tensors.items() if t["status"] == "kink"} == {"hidden.b", "out.b", "x"}
    assert report["summary"]["kinks"] > 0
    worst = max(t["max_rel_error"] for t in tensors.values() if t["max_rel_error"] is not None)
    assert worst < 1e-8


def test_buggy_network_names_the_buggy_tensor(run_cli):
    code, report = _json(run_cli, "crop_yield_buggy.py")
    assert code == 1 and not report["ok"]
    failing = [t["name"] for layer in report["layers"] for t in layer["tensors"] if t["status"] == "fail"]
    assert failing == ["out.W"]
    result = run_cli("check", str(SAMPLES / "crop_yield_buggy.py"))
    assert result.exit_code == 1 and "out.W" in result.output.splitlines()[-1]


def test_vector_output_layer_passes(run_cli):
    code, report = _json(run_cli, "sensor_mixer.py")
    assert code == 0 and report["ok"]
    assert {t["name"] for layer in report["layers"] for t in layer["tensors"]} == {
        "mix.W", "mix.b", "gain", "raw"}


def test_stack_sample_passes_every_layer(run_cli):
    code, report = _json(run_cli, "shop_demand_stack.py")
    assert code == 0 and report["summary"]["error_enters_at"] == []
    assert [(layer["name"], layer["own"]) for layer in report["layers"]] == [
        ("hidden", "pass"), ("relu", "pass"), ("trend", "pass"), ("forecast", "pass"),
        ("loss", "pass"), ("inputs", None)]


def test_stack_sample_with_a_wrong_input_gradient_names_the_layer(run_cli):
    code, report = _json(run_cli, "shop_demand_stack_buggy.py")
    assert code == 1 and report["summary"]["error_enters_at"] == ["trend"]
    inherited = {t["name"]: t.get("inherited_from") for layer in report["layers"]
                 for t in layer["tensors"] if t["status"] == "fail"}
    assert inherited == {"hidden.W": "trend", "hidden.b": "trend", "x": "trend"}
    trend = next(layer for layer in report["layers"] if layer["name"] == "trend")
    assert trend["own_check"]["input_gradient_wrong"] and trend["own_check"]["wrong_param_gradients"] == []
    lines = run_cli("check", str(SAMPLES / "shop_demand_stack_buggy.py")).output.splitlines()
    assert lines[-2].startswith("error enters at trend: its input gradient is wrong")
    assert "inherited from trend: hidden.W, hidden.b, x" in lines[-2]


def test_stack_sample_in_worker_processes_and_junit(run_cli, tmp_path):
    result = run_cli("check", str(SAMPLES / "shop_demand_stack_buggy.py"), "--jobs", "2",
                     "--junit", "out.xml", "--json", "out.json")
    assert result.exit_code == 1
    assert json.loads((tmp_path / "out.json").read_text())["summary"]["error_enters_at"] == ["trend"]
    xml = (tmp_path / "out.xml").read_text()
    assert 'classname="' in xml and "shop_demand_stack_buggy.trend.own" in xml and "inherited from: trend" in xml
