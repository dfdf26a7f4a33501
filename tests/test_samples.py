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
