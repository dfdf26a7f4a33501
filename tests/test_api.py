"""The Python API: probe, probe_target, the report model, errors chained to the user's."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import SAMPLES

import gradprobe

W = np.array([[0.2, -0.4], [1.1, 0.3], [-0.7, 0.9]])
X = np.array([[1.0, -2.0, 0.5], [0.3, 0.8, -1.2]])


def forward(p, i):
    return float(np.sum(np.sin(i["x"] @ p["W"])))


def backward(p, i):
    return {"W": i["x"].T @ np.cos(i["x"] @ p["W"])}


def test_probe_returns_the_report_model():
    report = gradprobe.probe(forward, backward, {"W": W}, {"x": X})
    assert isinstance(report, gradprobe.Report) and report.ok
    assert [layer.name for layer in report.layers] == ["W"]
    assert report.tensor("W").checked == 6
    assert "layer / tensor" in gradprobe.render_text(report)
    assert gradprobe.report_dict(report)["schema"] == "gradprobe.report/1"
    assert gradprobe.raise_if_failed(report) is report


def test_raise_if_failed_carries_the_per_layer_report():
    report = gradprobe.probe(forward, lambda p, i: {"W": 2 * backward(p, i)["W"]}, {"W": W}, {"x": X})
    with pytest.raises(AssertionError) as info:
        gradprobe.raise_if_failed(report)
    first, *rest = str(info.value).splitlines()
    worst = gradprobe.common.tensors.format_index(report.tensor("W").worst_index)  # all tie at 0.5
    d = report.tensor("W").worst_detail
    assert first == (f"W disagrees: rel error 5.0e-01 at {worst} > 1e-06"  # |2g - g| / |2g|
                     f" (backward gave {d.analytic:.6g}, numeric {d.numeric:.6g})")
    assert abs(d.analytic - 2 * d.numeric) < 1e-6 * abs(d.analytic)  # what it expected, said
    assert rest[0].startswith("gradprobe · test_api.forward ·")  # named after forward
    assert "analytic is 2 x numeric" in str(info.value)


def test_options_are_keywords_and_unknown_ones_are_refused():
    report = gradprobe.probe(forward, backward, {"W": W}, {"x": X}, threshold=1e-4, seed=9, sample=3)
    assert report.threshold == 1e-4 and report.seed == 9 and report.tensor("W").checked == 3
    with pytest.raises(gradprobe.UsageProblem, match="unknown option 'treshold'"):
        gradprobe.probe(forward, backward, {"W": W}, {"x": X}, treshold=1e-4)


def test_probe_target_by_entry_point():
    report = gradprobe.probe_target(str(SAMPLES / "crop_yield_buggy.py"))
    assert not report.ok and [t.name for t in report.failing_tensors] == ["out.W"]


def test_errors_are_gradprobes_own_chained_and_match_the_cli_sentence(run_cli, write_target):
    def broken(p, i):
        raise ValueError("negative stock level")

    with pytest.raises(gradprobe.UserCodeError) as info:
        gradprobe.probe(broken, backward, {"W": W}, {"x": X})
    assert isinstance(info.value.__cause__, ValueError)
    assert isinstance(info.value, gradprobe.ProbeError) and info.value.exit_code == 2
    write_target("""
        import numpy as np
        params = {"w": np.array([1.0])}
        def forward(p, i):
            raise ValueError("negative stock level")
        def backward(p, i):
            return {"w": p["w"]}
        """, "broken.py")
    cli_line = run_cli("check", "broken.py").output.strip().splitlines()[-1]
    api_error = pytest.raises(gradprobe.UserCodeError, gradprobe.probe_target, "broken.py")
    assert cli_line == f"gradprobe: error: {api_error.value.sentence()}"


def test_the_callers_arrays_are_unchanged_when_the_api_raises():
    params = {"W": W.copy()}
    before = params["W"].tobytes()
    with pytest.raises(gradprobe.UserCodeError):
        gradprobe.probe(forward, lambda p, i: 1 / 0, params, {"x": X})
    assert params["W"].tobytes() == before


def test_package_is_typed():
    from importlib.resources import files

    assert files("gradprobe").joinpath("py.typed").is_file()


def test_the_version_is_the_installed_metadata():
    from importlib.metadata import version

    assert gradprobe.__version__ == version("gradprobe")


def test_what_users_type_is_exported():
    """Every name in __all__ resolves (they are loaded on first use)."""
    for name in gradprobe.__all__:
        assert getattr(gradprobe, name) is not None
    assert gradprobe.layer_target.__module__ == "gradprobe.targets.adapters"


def test_importing_the_command_does_not_import_numpy_or_rich():
    import os
    import subprocess
    import sys

    code = "import sys, gradprobe.cli; print('numpy' in sys.modules, 'rich' in sys.modules)"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                          cwd=str(SAMPLES.parent), env={**os.environ, "PYTHONPATH": str(SAMPLES.parent)})
    assert done.stdout.split() == ["False", "False"]
