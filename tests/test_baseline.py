"""Comparing with an earlier run (--baseline, protocol section 8).

The targets' gradient errors are controlled exactly: the loss is sum(arctan(x)), whose
derivative 1 / (1 + x**2) is Abramowitz & Stegun 4.4.54 (from memory, as in
test_numerics_reference.py); backward returns it times (1 + EPS), a deliberate relative error
EPS in every element. The check resolves it: central differences of arctan here carry a
relative noise of about 1e-9, far below the EPS values that matter (1e-8 and up).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from conftest import SAMPLES

ARCTAN = """
import os
from pathlib import Path
import numpy as np

EPS = {eps!r}

def setup():
    return {{"x": np.linspace(-2.0, 2.5, 12).reshape(3, 4)}}, {{}}

def forward(params, inputs):
    Path(os.environ.get("CALLS_LOG", os.devnull)).open("a").write("f")
    return np.sum(np.arctan(params["x"]))

def backward(params, inputs):
    return {{"x": (1.0 + EPS) / (1.0 + params["x"] ** 2)}}  # A&S 4.4.54, times (1 + EPS)
"""


@pytest.fixture
def arctan(write_target):
    """Write the arctan target with a relative error ``eps``; returns its file name."""

    def write(eps: float, name: str = "arctan_case.py") -> str:
        write_target(ARCTAN.format(eps=eps), name)
        return name

    return write


def _tensor(path: Path, name: str = "x", report: int | None = None) -> dict:
    data = json.loads(path.read_text())
    if report is not None:
        data = data["reports"][report]
    return next(t for layer in data["layers"] for t in layer["tensors"] if t["name"] == name)


def test_a_hundredfold_growth_below_the_threshold_is_regressed(arctan, run_cli, tmp_path):
    """1e-9 -> 1e-7: both pass the threshold 1e-6, the error grew x100: exit 1, named."""
    assert run_cli("check", arctan(1e-9), "--json", "base.json").exit_code == 0
    result = run_cli("check", arctan(1e-7), "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 1, result.output
    x = _tensor(tmp_path / "now.json")
    assert x["status"] == "pass" and x["baseline"]["change"] == "regressed"
    assert x["baseline"]["status"] == "pass"
    assert x["baseline"]["max_rel_error"] == pytest.approx(1e-9, rel=0.2)
    assert 60 < x["baseline"]["growth"] < 110  # 1e-7 / 1e-9, the noise (~1e-9 relative) aside
    verdict = result.output.strip().splitlines()[-1]
    assert verdict.startswith("DISAGREES") and "regressed" in verdict and ": x" in verdict
    assert "↑ ×" in result.output  # the table's column: an arrow and the growth factor
    assert "numeric derivatives moved" not in result.output  # by ~1e-10, well below 1e-9


def test_an_unchanged_target_is_not_flagged(arctan, run_cli, tmp_path):
    run_cli("check", arctan(1e-9), "--json", "base.json")
    result = run_cli("check", arctan(1e-9), "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 0, result.output
    x = _tensor(tmp_path / "now.json")
    assert x["baseline"]["change"] == "same" and x["baseline"]["growth"] == pytest.approx(1.0)
    assert "none worse than the baseline" in result.output


def test_a_new_failure_is_worse(arctan, run_cli, tmp_path):
    """EPS 1e-3 fails the threshold: status pass -> fail is worse (and the run fails)."""
    run_cli("check", arctan(1e-9), "--json", "base.json")
    result = run_cli("check", arctan(1e-3), "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 1
    x = _tensor(tmp_path / "now.json")
    assert x["status"] == "fail" and x["baseline"]["change"] == "worse"
    assert "pass -> fail" in x["baseline"]["reason"]
    assert "worse than the baseline" in result.output.strip().splitlines()[-1]


def test_a_fixed_bug_is_better(arctan, run_cli, tmp_path):
    run_cli("check", arctan(1e-3), "--json", "base.json")
    result = run_cli("check", arctan(0.0), "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 0
    assert _tensor(tmp_path / "now.json")["baseline"]["change"] == "better"


@pytest.mark.parametrize("content, says", [
    (None, "cannot read the baseline"),
    ("not json at all", "is not JSON"),
    ('{"schema": "something/else", "layers": []}', "is not a gradprobe JSON report"),
    ('{"schema": "gradprobe.report/1", "target": "t", "seed": 0, "threshold": 1e-6, '
     '"layers": [{"tensors": [{"name": "x", "shape": [2], "status": "great"}]}]}', "status"),
    ('[1, 2]', "is not a gradprobe JSON report"),
])
def test_an_unusable_baseline_is_refused_before_any_work(arctan, run_cli, tmp_path, monkeypatch,
                                                         content, says):
    log = tmp_path / "calls.log"
    monkeypatch.setenv("CALLS_LOG", str(log))
    if content is not None:
        (tmp_path / "base.json").write_text(content)
    result = run_cli("check", arctan(0.0), "--baseline", "base.json")
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and says in lines[0] and "base.json" in lines[0], result.output
    assert not log.exists()  # forward was never called (nor the target imported)


@pytest.mark.parametrize("factor, code, change", [(None, 0, "same"), ("2", 1, "regressed")])
def test_the_growth_factor_is_respected(arctan, run_cli, tmp_path, factor, code, change):
    """1e-8 -> 5e-8 is x5: within the default x10, beyond --baseline-growth 2."""
    run_cli("check", arctan(1e-8), "--json", "base.json")
    extra = ["--baseline-growth", factor] if factor else []
    result = run_cli("check", arctan(5e-8), "--baseline", "base.json", "--json", "now.json", *extra)
    assert result.exit_code == code, result.output
    x = _tensor(tmp_path / "now.json")
    assert x["baseline"]["change"] == change and 4 < x["baseline"]["growth"] < 6


def test_the_growth_factor_must_be_one_or_more(arctan, run_cli):
    result = run_cli("check", arctan(0.0), "--baseline-growth", "0.5")
    assert result.exit_code == 2 and "growth factor" in result.output


def test_rounding_level_errors_are_not_compared(arctan, run_cli, tmp_path):
    """Complex step resolves 1e-15: 1e-15 -> 1e-13 grew x100, but below the float64 floor
    eps**(2/3) ~ 3.7e-11 it is rounding, not a regression."""
    run_cli("check", arctan(1e-15), "--method", "complex", "--json", "base.json")
    base = _tensor(tmp_path / "base.json")
    now_json = tmp_path / "now.json"
    result = run_cli("check", arctan(1e-13), "--method", "complex", "--baseline", "base.json",
                     "--json", "now.json")
    assert result.exit_code == 0, result.output
    now = _tensor(now_json)
    assert now["max_rel_error"] / base["max_rel_error"] > 30  # it did grow, as measured
    assert now["baseline"]["change"] == "same"
    assert now["baseline"]["floor"] == pytest.approx(2.220446049250313e-16 ** (2 / 3))


def test_a_multi_target_baseline_is_compared_target_by_target(arctan, run_cli, tmp_path):
    run_cli("check", arctan(1e-9, "one.py"), arctan(1e-9, "two.py"), "--json", "base.json")
    assert json.loads((tmp_path / "base.json").read_text())["schema"] == "gradprobe.runs/1"
    arctan(1e-7, "two.py")
    result = run_cli("check", "one.py", "two.py", "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 1
    assert _tensor(tmp_path / "now.json", report=0)["baseline"]["change"] == "same"
    assert _tensor(tmp_path / "now.json", report=1)["baseline"]["change"] == "regressed"


def test_other_targets_and_tensors_are_compared_where_they_can_be(arctan, run_cli, tmp_path,
                                                                  write_target):
    """A target with other tensor names: new and gone tensors, and a note on the settings."""
    run_cli("check", arctan(1e-9), "--json", "base.json")
    write_target(ARCTAN.format(eps=1e-9).replace('"x"', '"z"'), "renamed.py")
    result = run_cli("check", "renamed.py", "--baseline", "base.json", "--seed", "4",
                     "--json", "now.json")
    assert result.exit_code == 0, result.output
    data = json.loads((tmp_path / "now.json").read_text())
    assert _tensor(tmp_path / "now.json", "z")["baseline"]["change"] == "new"
    assert data["baseline"]["gone"][0]["name"] == "x"
    notes = " ".join(data["notes"])
    assert "gone since the baseline: x (pass)" in notes
    assert "target arctan_case.py (this run: renamed.py)" in notes and "seed 0 (this run: 4)" in notes
    assert "gone since the baseline" in result.output  # shown in the terminal too


def test_the_python_api_and_config_take_a_baseline(arctan, run_cli, tmp_path, monkeypatch):
    import gradprobe

    run_cli("check", arctan(1e-9), "--json", "base.json")
    arctan(1e-7)
    report = gradprobe.probe_target("arctan_case.py", baseline="base.json")
    assert not report.ok and [t.name for t in report.changed_for_worse] == ["x"]
    assert gradprobe.probe_target("arctan_case.py", baseline="base.json", baseline_growth=1000).ok
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\nbaseline = "base.json"\n')
    result = run_cli("check", "arctan_case.py")
    assert result.exit_code == 1 and "regressed" in result.output
    with pytest.raises(gradprobe.ProbeError, match="cannot read the baseline"):
        gradprobe.probe_target("arctan_case.py", baseline="missing.json")


def _crop_yield(scale: float):
    """The crop-yield sample with its hidden.W gradient times ``scale``."""
    from gradprobe.targets.loading import load_target

    sample = load_target(str(SAMPLES / "crop_yield.py"))

    def backward(params, inputs):
        grads = sample.backward(params, inputs)
        grads["hidden"]["W"] = grads["hidden"]["W"] * scale
        return grads

    return sample.forward, backward, sample.params, sample.inputs


def test_a_regression_under_loose_noise_bounds_is_caught(tmp_path):
    """hidden.W of the crop-yield sample has a numeric error bound of ~1.5e-7 relative, yet
    errors of 5e-9 measured: with forward unchanged the numeric derivatives are the same
    numbers, so 5e-9 -> 5e-7 (below the threshold) is caught whatever the bound."""
    import gradprobe

    forward, backward, params, inputs = _crop_yield(1.0)
    base = gradprobe.probe(forward, backward, params, inputs, label="crop")
    assert base.tensor("hidden.W").worst_noise > 5e-8  # the bound is loose here
    (tmp_path / "base.json").write_text(json.dumps(gradprobe.report_dict(base)))
    forward, backward, params, inputs = _crop_yield(1.0 + 5e-7)
    now = gradprobe.probe(forward, backward, params, inputs, label="crop",
                          baseline=str(tmp_path / "base.json"))
    w = now.tensor("hidden.W")
    assert w.status == "pass" and w.baseline.change == "regressed"
    assert 30 < w.baseline.growth < 200 and w.baseline.floor < 1e-8  # not the loose bound
    assert {t.name for t in now.changed_for_worse} == {"hidden.W"} and not now.ok


def test_a_rewritten_forward_compares_above_the_noise_bounds(arctan, run_cli, tmp_path, write_target):
    """arctan(x) as arctan2(x, 1) (equal mathematically, other rounding): the numeric
    derivatives move a little, and a change of error below that is not counted."""
    run_cli("check", arctan(1e-9), "--json", "base.json")
    write_target(ARCTAN.format(eps=1e-9).replace("np.arctan(params", "np.arctan2(params")
                 .replace('["x"]))', '["x"], 1.0))'), "arctan_case.py")
    result = run_cli("check", "arctan_case.py", "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 0, result.output
    x = _tensor(tmp_path / "now.json")
    assert x["baseline"]["change"] == "same" and x["baseline"]["numeric_shift"] > 0
    assert x["baseline"]["floor"] >= x["baseline"]["numeric_shift"]


def test_the_pytest_fixture_takes_a_baseline(tmp_path, pytester):
    """The fixture's ini setting: a test whose backward regressed fails with the reason."""
    import numpy as np

    import gradprobe

    x = np.linspace(-2.0, 2.5, 12).reshape(3, 4)
    base = gradprobe.probe(lambda p, i: np.sum(np.arctan(p["x"])),
                           lambda p, i: {"x": (1 + 1e-9) / (1 + p["x"] ** 2)}, {"x": x})
    (tmp_path / "base.json").write_text(json.dumps(gradprobe.report_dict(base)))
    pytester.makeini(f"[pytest]\ngradprobe_baseline = {tmp_path / 'base.json'}\n")
    pytester.makepyfile(f"""
        import numpy as np

        def test_arctan(grad_probe):
            x = np.linspace(-2.0, 2.5, 12).reshape(3, 4)
            grad_probe(lambda p, i: np.sum(np.arctan(p["x"])),
                       lambda p, i: {{"x": (1 + {{eps}}) / (1 + p["x"] ** 2)}}, {{"x": x}})
        """.replace("{eps}", "1e-7"))
    result = pytester.runpytest("-p", "no:cacheprovider", "-p", "no:hypothesispytest", "-q")
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(["*x: regressed since the baseline*"])


def test_junit_and_html_show_the_comparison(arctan, run_cli, tmp_path):
    """JUnit fails the regressed tensor's testcase with the reason; the HTML page shows the
    baseline's worst error beside this run's."""
    import xml.etree.ElementTree as ET

    run_cli("check", arctan(1e-9), "--json", "base.json")
    result = run_cli("check", arctan(1e-7), "--baseline", "base.json", "--junit", "r.xml",
                     "--html", "r.html")
    assert result.exit_code == 1
    suite = ET.parse(tmp_path / "r.xml").getroot().find("testsuite")
    assert suite.get("failures") == "1"
    failure = suite.find("testcase").find("failure")
    assert failure.get("type") == "baseline regression"
    assert failure.get("message").startswith("x: regressed since the baseline: worst relative error 1.0e-09")
    page = (tmp_path / "r.html").read_text()
    assert "baseline's worst rel" in page and "1.0e-09 (pass)" in page and "↑ ×" in page
    assert "regressed since the baseline" in page


def test_without_a_baseline_nothing_changes(arctan, run_cli, tmp_path):
    """No baseline object, no column, no verdict words (the report keys of section 8 are absent)."""
    result = run_cli("check", arctan(1e-9), "--json", "r.json")
    x = _tensor(tmp_path / "r.json")
    assert "baseline" not in x and "baseline" not in json.loads((tmp_path / "r.json").read_text())
    assert "vs baseline" not in result.output and "baseline" not in result.output


def test_kink_to_pass_and_pass_to_kink(write_target, run_cli, tmp_path):
    """|v| at an exact 0 is a kink (sign(0) = 0 lies between the one-sided slopes -1 and 1,
    common practice); moving v off 0 makes it pass: kink -> pass is better, pass -> kink worse."""
    source = """
        import numpy as np
        V = {v!r}
        def setup():
            return {{"v": np.array(V)}}, {{}}
        def forward(params, inputs):
            return np.sum(np.abs(params["v"]))
        def backward(params, inputs):
            return {{"v": np.sign(params["v"])}}
        """
    write_target(source.format(v=[0.0, 1.5]), "gate.py")
    assert run_cli("check", "gate.py", "--json", "kinked.json").exit_code == 0
    write_target(source.format(v=[0.5, 1.5]), "gate.py")
    assert run_cli("check", "gate.py", "--json", "smooth.json", "--baseline", "kinked.json").exit_code == 0
    assert _tensor(tmp_path / "smooth.json", "v")["baseline"]["change"] == "better"
    write_target(source.format(v=[0.0, 1.5]), "gate.py")
    result = run_cli("check", "gate.py", "--json", "again.json", "--baseline", "smooth.json")
    assert result.exit_code == 1
    assert _tensor(tmp_path / "again.json", "v")["baseline"]["change"] == "worse"
    assert "↑ worse, was pass" in result.output
    assert "pass -> kink" in _tensor(tmp_path / "again.json", "v")["baseline"]["reason"]


def test_tensors_left_out_by_only_are_not_gone(write_target, run_cli, tmp_path):
    """Two tensors, d/dx sin x = cos x (A&S 4.3.110, from memory, as in
    test_numerics_reference.py); --only checks one of them: the other is not reported gone."""
    write_target("""
        import numpy as np
        def setup():
            return {"a": np.array([0.3, 1.1]), "b": np.array([2.0, -0.7])}, {}
        def forward(params, inputs):
            return np.sum(np.sin(params["a"])) + np.sum(np.sin(params["b"]))
        def backward(params, inputs):
            return {"a": np.cos(params["a"]), "b": np.cos(params["b"])}
        """, "pair.py")
    run_cli("check", "pair.py", "--json", "base.json")
    result = run_cli("check", "pair.py", "--only", "a", "--baseline", "base.json", "--json", "now.json")
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "now.json").read_text())["baseline"]["gone"] == []
    assert "gone since the baseline" not in result.output


def test_a_reshaped_tensor_is_compared_worst_against_worst(arctan, run_cli, tmp_path, write_target):
    """x as 2x6 instead of 3x4: no shared coordinates, so worst against worst above the noise
    bounds; 1e-9 -> 1e-7 still shows as regressed."""
    run_cli("check", arctan(1e-9), "--json", "base.json")
    write_target(ARCTAN.format(eps=1e-7).replace("reshape(3, 4)", "reshape(2, 6)"), "arctan_case.py")
    result = run_cli("check", "arctan_case.py", "--baseline", "base.json", "--json", "now.json")
    x = _tensor(tmp_path / "now.json")
    assert x["baseline"]["compared_on"] is None and x["baseline"]["floor"] >= x["worst_noise"]
    assert x["baseline"]["change"] == "regressed" and result.exit_code == 1
    assert "checked on other coordinates than in the baseline" in result.output


def test_float32_code_checked_on_its_float64_run_compares_at_float64_resolution(write_target, run_cli,
                                                                               tmp_path):
    """float32 arctan whose errors are measured on its float64 run: 1e-9 -> 1e-7 is caught,
    the floor being float64's eps**(2/3), not float32's 2.4e-5 (above the threshold)."""
    source = ARCTAN.replace('reshape(3, 4)', 'reshape(3, 4).astype(np.float32)').replace(
        '{{"x": (1.0 + EPS) / (1.0 + params["x"] ** 2)}}',
        '{{"x": ((1.0 + EPS) / (1.0 + params["x"].astype(np.float64) ** 2)).astype(params["x"].dtype)}}')
    write_target(source.format(eps=1e-9), "narrow.py")
    run_cli("check", "narrow.py", "--json", "base.json")
    assert json.loads((tmp_path / "base.json").read_text())["compute_dtype"] == "float32"
    write_target(source.format(eps=1e-7), "narrow.py")
    result = run_cli("check", "narrow.py", "--baseline", "base.json", "--json", "now.json")
    x = _tensor(tmp_path / "now.json")
    assert x["baseline"]["change"] == "regressed" and result.exit_code == 1, result.output
    assert x["baseline"]["floor"] < 1e-9


@pytest.mark.parametrize("options", [["--sample", "3"], ["--directions", "1"], ["--sample", "5", "--directions", "0"]])
def test_a_baseline_from_other_sampling_says_so(arctan, run_cli, tmp_path, options):
    """Protocol section 8: a baseline from other settings (threshold, method, seed, sampling) is
    compared where it can be and says so in a note; the same sampling says nothing."""
    assert run_cli("check", arctan(1e-9), "--json", "base.json").exit_code == 0
    result = run_cli("check", arctan(1e-9), "--baseline", "base.json", *options, "--json", "now.json")
    assert result.exit_code == 0, result.output
    notes = json.loads((tmp_path / "now.json").read_text())["notes"]
    assert any("sampling" in n for n in notes), notes
    same = run_cli("check", arctan(1e-9), "--baseline", "base.json", "--json", "same.json")
    assert not any("sampling" in n for n in json.loads((tmp_path / "same.json").read_text())["notes"])
