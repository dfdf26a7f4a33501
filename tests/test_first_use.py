"""What a new user meets first: one-sentence errors that say what to do, report paths refused
before any work, the expected value at the worst coordinate, quiet lines that name their
target, stable column titles and clean piped output."""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import SAMPLES

from gradprobe.render.columns import fit
from gradprobe.render.terminal import COLUMNS, DROP_ORDER

COUNTING = """
import numpy as np
from pathlib import Path

def setup():
    return {"w": np.array([0.3, -1.2])}, {}

def forward(p, i):
    Path("called").write_text("forward ran")
    return float(np.sum(p["w"] ** 2))

def backward(p, i):
    return {"w": 2 * p["w"]}
"""


def _error(result) -> str:
    lines = [line for line in result.output.splitlines() if line.startswith("gradprobe: error:")]
    assert len(lines) == 1, result.output  # one sentence, one line
    return lines[0]


def test_a_misspelt_option_is_one_sentence_with_the_suggestion(run_cli):
    result = run_cli("check", "a.py", "--sed", "3")
    assert result.exit_code == 2
    assert result.output.strip() == (
        "gradprobe: error: no such option '--sed' (did you mean one of: '--method', '--sample', "
        "'--seed'?)")


def test_a_bad_option_value_is_one_sentence_that_says_where_to_look(run_cli):
    result = run_cli("check", "a.py", "--method", "secant")
    assert result.exit_code == 2
    assert result.output.strip() == (
        "gradprobe: error: invalid value for '--method': 'secant' is not one of 'central', "
        "'richardson', 'complex'; see gradprobe check --help.")
    assert "Usage:" not in result.output


def test_an_unopenable_report_path_is_refused_before_forward_runs(run_cli, write_target, tmp_path):
    write_target(COUNTING, "counting.py")
    result = run_cli("check", "counting.py", "--html", "/proc/gradprobe-report.html")
    assert result.exit_code == 2
    assert "cannot write the HTML report to /proc/gradprobe-report.html" in _error(result)
    assert not (tmp_path / "called").exists()  # no check ran
    assert not (tmp_path / "counting.py").with_name("gradprobe-report.html").exists()


def test_probing_a_report_path_leaves_no_file_behind(run_cli, write_target, tmp_path):
    write_target(COUNTING, "counting.py")
    result = run_cli("check", "counting.py", "--json", "out/report.json")
    assert result.exit_code == 2 and "the folder out does not exist" in _error(result)
    assert run_cli("check", "counting.py", "--junit", "report.xml").exit_code == 0
    assert (tmp_path / "report.xml").read_text().startswith("<?xml")


@pytest.mark.parametrize("source, fix", [
    ("import numpy as np\ndef setup():\n    return {'w': np.ones(2)}, {}\n"
     "def forward(p, i):\n    return float(np.sum(p['w']))\n",
     "; define backward(params, inputs) returning the loss's gradient as a mapping shaped like "
     "params."),
    ("import numpy as np\ndef setup():\n    return {'w': np.ones(2)}, {}\n"
     "def forward(p, i):\n    return float(np.sum(p['w']))\n"
     "def backward(p):\n    return {'w': np.ones(2)}\n",
     "; backward must take (params, inputs)."),
    ("import numpy as np\ndef setup():\n    return {'w': np.ones(2)}, {'x': np.ones(2)}\n"
     "def forward(p, i):\n    i['x'] *= 2\n    return float(np.sum(p['w'] * i['x']))\n"
     "def backward(p, i):\n    return {'w': 2 * i['x']}\n",
     "; compute into new arrays instead (y = x * 2, not x *= 2), or copy the array first."),
])
def test_errors_end_with_what_to_do(run_cli, write_target, source, fix):
    write_target(source, "case.py")
    result = run_cli("check", "case.py")
    assert result.exit_code == 2
    assert _error(result).endswith(fix)


def test_the_table_says_what_backward_gave_and_what_was_expected(run_cli, tmp_path):
    target = str(SAMPLES / "crop_yield_buggy.py")
    result = run_cli("check", target, "--json", "report.json")
    assert result.exit_code == 1
    report = json.loads((tmp_path / "report.json").read_text())
    tensor = next(t for layer in report["layers"] for t in layer["tensors"] if t["status"] == "fail")
    worst = max((d for d in tensor["details"] if d["status"] == "fail"), key=lambda d: d["rel_error"])
    index = ", ".join(str(i) for i in worst["index"])
    line = next(line for line in result.output.splitlines() if line.startswith("worst of "))
    assert line.startswith(f"worst of {tensor['name']}[{index}]: backward gave ")
    gave, numeric = line.split("backward gave ")[1].split(" ± ")[0].split(", numeric ")
    assert float(gave) == pytest.approx(worst["analytic"], rel=1e-5)
    assert float(numeric) == pytest.approx(worst["numeric"], rel=1e-5)


def test_quiet_lines_name_their_target(run_cli):
    good, bad = str(SAMPLES / "crop_yield.py"), str(SAMPLES / "crop_yield_buggy.py")
    result = run_cli("check", good, bad, "-q")
    assert result.exit_code == 1
    lines = result.output.splitlines()
    assert lines[0].startswith(f"{good}: agrees · ")
    assert lines[1].startswith(f"{bad}: DISAGREES · 1 of 5 tensors beyond 1e-06: out.W")


def test_piped_output_has_no_trailing_spaces(run_cli):
    result = run_cli("check", str(SAMPLES / "crop_yield.py"), str(SAMPLES / "crop_yield_buggy.py"))
    assert result.output.count("\n") > 10
    assert all(line == line.rstrip() for line in result.output.splitlines())


def test_column_titles_do_not_change_when_a_hint_appears():
    cells = {c.key: ["  dense.W", "3x2", "6/6", "1.0e+00", "3.1e-09", "3.1e-01", "[1, 0]", "fail", ""][i:i + 1]
             for i, c in enumerate(COLUMNS)}
    hinted = {**cells, "hint": ["analytic is -1 x numeric: the sign is flipped"]}
    for width in (70, 90, 100, 120):
        plain, with_hint = fit(COLUMNS, cells, width, DROP_ORDER), fit(COLUMNS, hinted, width, DROP_ORDER)
        assert plain.short_titles == with_hint.short_titles, width


def test_the_settings_table_has_a_name_of_its_own(run_cli):
    assert run_cli("check", "--settings-in-force").exit_code == 0
    assert run_cli("check", "--show-settings").exit_code == 2


def test_arrays_are_unchanged_after_an_error_that_ends_with_a_fix(write_target):
    import gradprobe

    x = np.ones(2)
    with pytest.raises(gradprobe.InPlaceWriteError) as info:
        gradprobe.probe(lambda p, i: float(np.sum(p["w"] * i["x"].__imul__(2))),
                        lambda p, i: {"w": i["x"]}, {"w": np.ones(2)}, {"x": x})
    assert str(info.value).endswith("or copy the array first.")
    assert np.array_equal(x, np.ones(2))


def test_only_and_skip_choose_the_tensors_checked(run_cli):
    target = str(SAMPLES / "crop_yield_buggy.py")  # out.W is wrong
    only = run_cli("check", target, "--only", "hidden.*", "--json", "-")
    report = json.loads(only.stdout)
    assert only.exit_code == 0
    assert [t["name"] for layer in report["layers"] for t in layer["tensors"]] == ["hidden.W", "hidden.b"]
    assert "not checked (only/skip): out.W, out.b, x" in report["notes"]
    assert run_cli("check", target, "--skip", "out.W").exit_code == 0
    assert run_cli("check", target, "--only", "out.*,x", "--skip", "x").exit_code == 1
    nothing = run_cli("check", target, "--only", "encoder.*")
    assert nothing.exit_code == 2
    assert "the tensors are hidden.W, hidden.b, out.W, out.b, x" in _error(nothing)


def test_selection_from_pyproject_and_the_api(run_cli, tmp_path):
    import gradprobe

    (tmp_path / "pyproject.toml").write_text(
        f'[tool.gradprobe]\ntargets = ["{SAMPLES / "crop_yield_buggy.py"}"]\nskip = "out.*"\n')
    assert run_cli("check").exit_code == 0
    report = gradprobe.probe_target(str(SAMPLES / "crop_yield_buggy.py"), only="out.W")
    assert [t.name for t in report.tensors] == ["out.W"] and not report.ok
    with pytest.raises(gradprobe.UsageProblem, match="comma-separated name patterns"):
        gradprobe.probe_target(str(SAMPLES / "crop_yield_buggy.py"), only=" , ")


def test_a_stack_keeps_its_layers_own_checks_under_a_selection(run_cli):
    result = run_cli("check", str(SAMPLES / "shop_demand_stack_buggy.py"), "--only", "forecast.*",
                     "--json", "-")
    report = json.loads(result.stdout)
    assert result.exit_code == 1 and report["summary"]["error_enters_at"] == ["trend"]
    assert {t["name"] for layer in report["layers"] for t in layer["tensors"]} == {"forecast.W", "forecast.b"}


def test_the_settings_table_is_not_widened_by_long_defaults(run_cli):
    lines = run_cli("check", "--settings-in-force").output.splitlines()
    assert all(line == line.rstrip() for line in lines)
    seed = next(line for line in lines if line.startswith("seed "))
    assert len(seed) <= 45 and seed.endswith("default")  # not padded to the longest default's width (130)
