"""[tool.gradprobe] defaults and targets, several targets, the worst exit code, provenance."""

from __future__ import annotations

import json
import textwrap

from conftest import SAMPLES

GOOD = """
import numpy as np
params = {"w": np.array([0.5, 1.5])}
def forward(p, i):
    return float(np.sum(p["w"] ** 3))
def backward(p, i):
    return {"w": 3 * p["w"] ** 2 * SCALE}
"""


def _project(tmp_path, table: str, **targets: float) -> None:
    for name, scale in targets.items():
        (tmp_path / f"{name}.py").write_text(f"SCALE = {scale}\n" + GOOD)
    (tmp_path / "pyproject.toml").write_text(textwrap.dedent(table))


def test_configured_targets_are_checked_when_none_is_named(run_cli, tmp_path):
    _project(tmp_path, """
        [tool.gradprobe]
        targets = ["good.py", "off.py"]
        """, good=1.0, off=1.0001)
    result = run_cli("check", "--json", "-")
    assert result.exit_code == 1
    document = json.loads(result.stdout)
    assert document["schema"] == "gradprobe.runs/1" and document["exit_code"] == 1
    assert [r["target"] for r in document["reports"]] == ["good.py", "off.py"]
    assert "2 targets, exit code 1" in result.stderr


def test_config_sets_defaults_and_the_command_line_overrides(run_cli, tmp_path):
    _project(tmp_path, """
        [tool.gradprobe]
        threshold = 1e-3
        seed = 4
        """, off=1.0001)
    assert run_cli("check", "off.py").exit_code == 0  # 1e-4 error within the configured 1e-3
    assert run_cli("check", "off.py", "--fail-above", "1e-6").exit_code == 1
    settings = run_cli("check", "off.py", "--seed", "8", "--settings-in-force").output
    lines = {line.split()[0]: line for line in settings.splitlines()[1:]}
    assert lines["threshold"].split()[1:] == ["0.001", str(tmp_path / "pyproject.toml")]
    assert lines["seed"].split()[1:] == ["8", "command", "line"]
    assert lines["method"].split()[-1] == "default"
    assert "command line" in lines["targets"]


def test_the_worst_exit_code_wins(run_cli, tmp_path):
    _project(tmp_path, "", good=1.0, off=2.0)
    assert run_cli("check", "good.py").exit_code == 0
    assert run_cli("check", "good.py", "off.py").exit_code == 1
    assert run_cli("check", "good.py", "off.py", "missing.py").exit_code == 2


def test_a_ci_step_fails_exactly_above_the_threshold(run_cli, tmp_path):
    """The CI recipe: exit 1 exactly when a tensor's error exceeds --fail-above."""
    _project(tmp_path, "", off=1.001)  # relative error 1e-3 in every coordinate
    assert run_cli("check", "off.py", "--fail-above", "2e-3").exit_code == 0
    assert run_cli("check", "off.py", "--fail-above", "5e-4").exit_code == 1


def test_a_misspelt_key_is_a_clear_error(run_cli, tmp_path):
    _project(tmp_path, """
        [tool.gradprobe]
        treshold = 1e-3
        """, good=1.0)
    result = run_cli("check", "good.py")
    assert (result.exit_code, result.stderr.strip()) == (2, (
        f"gradprobe: error: {tmp_path / 'pyproject.toml'}: unknown key 'treshold' in "
        "[tool.gradprobe]; did you mean 'threshold'?"))


def test_a_wrongly_typed_value_is_a_clear_error(run_cli, tmp_path):
    _project(tmp_path, """
        [tool.gradprobe]
        seed = "three"
        """, good=1.0)
    result = run_cli("check", "good.py")
    assert (result.exit_code, result.stderr.strip()) == (2, (
        f"gradprobe: error: {tmp_path / 'pyproject.toml'}: [tool.gradprobe] seed must be int "
        "(seed for every random draw), not 'three'."))


def test_no_target_anywhere_is_a_usage_error(run_cli, tmp_path):
    (tmp_path / "pyproject.toml").write_text("[project]\nname = 'x'\n")
    result = run_cli("check")
    assert (result.exit_code, result.stderr.strip()) == (2, (
        "gradprobe: error: no TARGET given and no targets in [tool.gradprobe] of a "
        "pyproject.toml here or above (see gradprobe check --help)."))


def test_configured_file_targets_resolve_from_the_pyprojects_folder(run_cli, tmp_path, monkeypatch):
    _project(tmp_path, """
        [tool.gradprobe]
        targets = ["good.py"]
        """, good=1.0)
    (tmp_path / "sub").mkdir()
    monkeypatch.chdir(tmp_path / "sub")
    from click.testing import CliRunner

    from gradprobe.cli import cli

    assert CliRunner().invoke(cli, ["check"]).exit_code == 0


def test_help_says_where_settings_come_from(run_cli, tmp_path):
    text = run_cli("check", "--help").output
    assert "[tool.gradprobe]" in text and "--settings-in-force" in text and "--junit" in text
    assert "Settings in force" not in text
    _project(tmp_path, """
        [tool.gradprobe]
        seed = 5
        """)
    asked = run_cli("check", "--help", "--settings-in-force").output
    section = asked[asked.index("Settings in force"):]
    seed_line = next(line for line in section.splitlines() if line.split()[:1] == ["seed"])
    assert seed_line.split()[1:] == ["5", str(tmp_path / "pyproject.toml")]
    method_line = next(line for line in section.splitlines() if line.split()[:1] == ["method"])
    assert method_line.split()[-1] == "default"


def test_starter_writes_a_target_that_runs(run_cli, tmp_path):
    result = run_cli("starter", "my_layer.py")
    assert result.exit_code == 0 and (tmp_path / "my_layer.py").is_file()
    assert "def backward" in (tmp_path / "my_layer.py").read_text()
    assert run_cli("check", "my_layer.py").exit_code == 0
    again = run_cli("starter", "my_layer.py")
    assert again.exit_code == 2 and "already exists; pass --force" in again.output
    assert run_cli("starter", "my_layer.py", "--force").exit_code == 0


def test_samples_folder_targets_all_pass_or_fail_as_documented(run_cli):
    result = run_cli("check", str(SAMPLES / "crop_yield.py"), str(SAMPLES / "sensor_mixer.py"),
                     f"{SAMPLES / 'stateful_layer.py'}:case", "-q")
    assert result.exit_code == 0


# Every way TOML v1.0.0 (toml.io, sections "Table", "Keys" (dotted keys) and "Inline Table")
# can declare [tool.gradprobe] is read: the file is parsed whenever it might hold the table.
TABLE_FORMS = [
    "[tool.gradprobe]\nseed = 3\n",
    "[ \"tool\" . 'gradprobe' ]\nseed = 3\n",
    "tool.gradprobe.seed = 3\n",
    "tool = { gradprobe = { seed = 3 } }\n",
    "[tool]\ngradprobe = { seed = 3 }\n",
    "[tool]\nother = 1\n\"gradprobe\".seed = 3\n",
]


def test_every_toml_form_of_the_table_is_read(tmp_path):
    from gradprobe.settings.config import load_config

    for form in TABLE_FORMS:
        (tmp_path / "pyproject.toml").write_text(form + '[project]\nname = "yields"\n')
        assert load_config(tmp_path).values == {"seed": 3}, form


def test_a_pyproject_without_the_table_is_not_parsed(tmp_path):
    from gradprobe.settings.config import load_config, may_hold_our_table

    # Other tools' tables and the word in other places (a package named after gradprobe):
    text = '[project]\nname = "gradprobe-demo"\n[project.scripts]\ngradprobe-demo = "d:main"\n' \
           '[tool.mypy]\nstrict = true\n[tool.setuptools.package-data]\ngradprobe = ["py.typed"]\n'
    assert not may_hold_our_table(text) and not may_hold_our_table("[tool.ruff]\nx = 1\n")
    assert all(may_hold_our_table(form) for form in TABLE_FORMS)
    (tmp_path / "pyproject.toml").write_text(text)
    config = load_config(tmp_path)
    assert config.path == tmp_path / "pyproject.toml" and config.values == {}
