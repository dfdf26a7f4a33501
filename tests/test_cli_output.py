"""The CLI's outputs: JSON report layout, stdout discipline, plain text, options."""

from __future__ import annotations

import json

import numpy as np
from conftest import SAMPLES

from gradprobe import probe

TENSOR_KEYS = {
    "name", "layer", "kind", "shape", "dtype", "checked", "failed", "kinks", "max_abs_error",
    "max_rel_error", "worst_index", "bad_indices", "status", "hint",
}


def test_json_report_has_the_protocol_layout(run_cli, tmp_path):
    result = run_cli("check", str(SAMPLES / "crop_yield_buggy.py"), "--json", "report.json")
    assert result.exit_code == 1
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["schema"] == "gradprobe.report/1"
    assert {"target", "ok", "threshold", "seed", "summary", "layers", "errors"} <= set(report)
    assert {"tensors", "checked", "failed", "kinks", "evaluations", "seconds"} <= set(report["summary"])
    for layer in report["layers"]:
        assert {"name", "ok", "max_rel_error", "tensors"} <= set(layer)
        for t in layer["tensors"]:
            assert TENSOR_KEYS <= set(t)
            assert t["status"] in {"pass", "fail", "kink", "inconclusive"}
    out_w = next(t for l in report["layers"] for t in l["tensors"] if t["name"] == "out.W")
    assert out_w["shape"] == [6, 1] and out_w["layer"] == "out" and out_w["kind"] == "param"
    assert out_w["failed"] == len(out_w["bad_indices"]) and out_w["worst_index"] in out_w["bad_indices"]
    # the table still goes to stdout when the JSON goes to a file
    assert "out.W" in result.stdout


def test_json_to_stdout_leaves_nothing_else_there(run_cli):
    result = run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--json", "-")
    assert result.exit_code == 0
    json.loads(result.stdout)  # the whole of stdout is the report
    assert "agree" in result.stderr  # the verdict line moved to stderr


def test_quiet_prints_only_the_verdict(run_cli):
    result = run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--quiet")
    assert result.exit_code == 0
    assert result.stdout.strip().splitlines() == [result.stdout.strip()]
    assert result.stdout.startswith(f"{SAMPLES / 'sensor_mixer.py'}: agrees · 4 tensors within 1e-06")


def test_output_is_plain_when_not_a_terminal(run_cli, monkeypatch):
    monkeypatch.setenv("NO_COLOR", "1")
    result = run_cli("check", str(SAMPLES / "crop_yield.py"))
    assert "\x1b[" not in result.output
    assert "layer / tensor" in result.output


def test_help_has_examples_and_exit_codes(run_cli):
    result = run_cli("check", "--help")
    assert "Examples:" in result.output and "Exit codes:" in result.output
    for option in ("--fail-above", "--json", "--seed", "--quiet", "--traceback"):
        assert option in result.output


def test_version(run_cli):
    from gradprobe import __version__

    assert run_cli("--version").output.strip() == f"gradprobe {__version__}"


def test_threshold_option_decides_the_exit_code(write_target, run_cli):
    write_target(
        """
        import numpy as np
        params = {"w": np.array([1.0, 2.0])}
        def forward(p, i):
            return float(np.sum(p["w"] ** 2))
        def backward(p, i):
            return {"w": 2 * p["w"] * (1 + 1e-4)}
        """,
        "slightly.py",
    )
    assert run_cli("check", "slightly.py").exit_code == 1
    assert run_cli("check", "slightly.py", "--fail-above", "1e-3").exit_code == 0
    bad = run_cli("check", "slightly.py", "--fail-above", "-1")
    assert bad.exit_code == 2 and "threshold must be a positive number" in bad.output


def test_unknown_option_is_a_usage_error(run_cli):
    assert run_cli("check", "x.py", "--no-such-flag").exit_code == 2


def test_full_sweep_costs_two_evaluations_per_coordinate_plus_a_constant():
    w = np.linspace(-1, 1, 40)
    report = probe(lambda p, i: float(np.sum(np.cos(p["w"]))), lambda p, i: {"w": -np.sin(p["w"])}, {"w": w})
    assert report.ok
    # 2 preflight calls, 2 looking for a narrower type inside (float64 code sees the first
    # move), 3 measuring the loss's rounding
    assert 2 * w.size + 7 <= report.evaluations <= 2 * w.size + 9


def test_grad_output_is_seeded():
    """Array outputs are checked as sum(g * out) with g ~ N(0, 1) from the seed."""
    drawn = []

    def bwd(p, i, g):
        drawn.append(g.copy())
        return {"w": g * 2 * p["w"]}

    w = np.array([0.5, -1.5, 2.0])
    probe(lambda p, i: p["w"] ** 2, bwd, {"w": w})

    probe(lambda p, i: p["w"] ** 2, bwd, {"w": w}, seed=0)
    probe(lambda p, i: p["w"] ** 2, bwd, {"w": w}, seed=1)
    assert np.array_equal(drawn[0], drawn[1]) and not np.array_equal(drawn[0], drawn[2])
    assert np.array_equal(drawn[0], np.random.default_rng(0).standard_normal(3))


def test_float32_code_that_refuses_float64_gets_a_looser_default_and_a_note():
    w = np.linspace(0.1, 1.0, 8, dtype=np.float32)

    def forward(p, i):
        return np.sum(np.exp(p["w"].astype(np.float32)))

    def backward(p, i, factor=1.0):
        return {"w": factor * np.exp(p["w"].astype(np.float32))}

    report = probe(forward, backward, {"w": w})
    # IEEE 754 binary32 has a 24-bit significand: unit roundoff u = 2**-24, and the default
    # threshold 2 sqrt(u) = 2**-11, to two digits 4.9e-4.
    assert report.ok and report.compute_dtype == "float32" and report.threshold == 4.9e-4
    assert report.notes == (
        "forward computes in float32: its unit roundoff is 6.0e-08, so central differences "
        "are good to about 2e-05 relative at best, and the default threshold for it is "
        "0.00049 (2 sqrt(u))",
    )
    assert not probe(forward, lambda p, i: backward(p, i, 1.1), {"w": w}).ok


def test_float32_code_that_accepts_float64_is_checked_on_its_float64_run():
    w = np.linspace(0.1, 1.0, 8, dtype=np.float32)
    report = probe(lambda p, i: np.sum(np.exp(p["w"])), lambda p, i: {"w": np.exp(p["w"])}, {"w": w})
    assert report.ok and report.compute_dtype == "float32" and report.threshold == 1e-6
    assert report.notes == (
        "forward computes in float32; forward and backward also run in float64, so backward's "
        "float64 gradient was checked against float64 numeric derivatives at the float32 "
        "values within 1e-06, and its float32 gradient against that float64 gradient within "
        "0.00049 (float32 rounding) or within what its rounding is measured to vary by",
    )


def test_method_option(run_cli):
    result = run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--method", "complex", "--json", "-")
    assert result.exit_code == 0 and json.loads(result.stdout)["method"] == "complex"
    assert run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--method", "richardson").exit_code == 0


def test_complex_method_on_a_forward_with_abs_exits_2(run_cli):
    result = run_cli("check", str(SAMPLES / "crop_yield.py"), "--method", "complex")
    assert result.exit_code == 2
    assert "drops the imaginary part" in result.output and "Traceback" not in result.output


def test_map_option_draws_failing_tensors(run_cli):
    result = run_cli("check", str(SAMPLES / "crop_yield_buggy.py"), "--map")
    assert result.exit_code == 1
    assert "out.W: 6 rows x 1 column" in result.output and "map: ' ' not checked" in result.output


def test_prints_in_user_code_do_not_reach_the_json_on_stdout(write_target, run_cli):
    write_target(
        """
        import numpy as np
        print("loading the sensor table")
        params = {"w": np.array([1.0, 2.0])}
        def forward(p, i):
            print("forward called")
            return float(np.sum(p["w"] ** 2))
        def backward(p, i):
            return {"w": 2 * p["w"]}
        """,
        "chatty.py",
    )
    result = run_cli("check", "chatty.py", "--json", "-")
    assert result.exit_code == 0
    assert json.loads(result.stdout)["ok"] is True
    assert "forward called" in result.stderr


def test_ctrl_c_stops_the_run_with_130(write_target, run_cli):
    write_target(
        """
        import numpy as np
        params = {"w": np.array([1.0, 2.0])}
        def forward(p, i):
            raise KeyboardInterrupt
        def backward(p, i):
            return {"w": 2 * p["w"]}
        """,
        "stop.py",
    )
    result = run_cli("check", "stop.py", "stop.py")
    assert result.exit_code == 130
    assert result.stderr.count("interrupted; your arrays are unchanged") == 1


def test_a_target_that_cannot_run_still_gets_its_json_report(write_target, run_cli, tmp_path):
    """A CI step reading the report finds why the check could not run, not a missing file."""
    write_target("""
        import numpy as np
        def setup():
            return {"w": np.ones(3)}, {}
        def forward(params, inputs):
            raise RuntimeError("pump offline")
        def backward(params, inputs):
            return {"w": np.ones(3)}
        """, "pump.py")
    result = run_cli("check", "pump.py", "--json", "report.json", "--fail-above", "1e-5", "--seed", "3")
    assert result.exit_code == 2
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["schema"] == "gradprobe.report/1" and report["target"] == "pump.py"
    assert report["ok"] is False and report["exit_code"] == 2 and report["layers"] == []
    assert report["threshold"] == 1e-5 and report["seed"] == 3
    assert report["summary"]["tensors"] == 0 and report["summary"]["evaluations"] == 0
    assert len(report["errors"]) == 1 and "pump offline" in report["errors"][0]
    # several targets none of which runs: the runs document lists each one's sentence
    result = run_cli("check", "pump.py", "absent.py", "--json", "-")
    assert result.exit_code == 2
    document = json.loads(result.stdout)
    assert document["schema"] == "gradprobe.runs/1" and document["reports"] == []
    assert [e["target"] for e in document["errors"]] == ["pump.py", "absent.py"]
