"""Every user-visible error sentence of the CLI, compared whole (golden strings).

Each test runs ``gradprobe`` in-process and compares the last line of standard error and the
exit code. Messages of the numeric engine are covered where the engine is tested.
"""

from __future__ import annotations

import textwrap

import pytest

GOOD = """
import numpy as np
params = {"w": np.array([0.5, -1.0, 2.0])}
def forward(p, i):
    return float(np.sum(np.sin(p["w"])))
def backward(p, i):
    return {"w": np.cos(p["w"])}
case = None
"""


@pytest.fixture
def good(tmp_path):
    (tmp_path / "case.py").write_text(textwrap.dedent(GOOD))
    return "case.py"


def _said(result) -> tuple[int, str]:
    return result.exit_code, result.stderr.strip().splitlines()[-1]


def test_no_target_anywhere(run_cli, tmp_path):
    """No TARGET and no configured targets."""
    assert _said(run_cli("check")) == (2, (
        "gradprobe: error: no TARGET given and no targets in [tool.gradprobe] of a pyproject.toml "
        "here or above (see gradprobe check --help)."))


def test_missing_file(run_cli):
    """A target file that does not exist."""
    assert _said(run_cli("check", "missing.py")) == (
        2, "gradprobe: error: missing.py: no such file missing.py; name a Python file (a path "
        "from the current folder) or a module.")


def test_missing_attribute_suggests_a_close_name(run_cli, good):
    """A misspelt :NAME gets a suggestion."""
    assert _said(run_cli("check", "case.py:cas")) == (
        2, "gradprobe: error: case.py:cas: case.py has no attribute 'cas'; did you mean 'case'?")


@pytest.mark.parametrize(("args", "sentence"), [
    (("--seed", "-5"), "the seed must be a whole number 0 or more, not -5."),
    (("--fail-above", "-1"), "the threshold must be a positive number, not -1.0."),
    (("--sample", "-1"), "sample must be 0 or more, not -1."),
    (("--directions", "-2"), "directions must be 0 or more, not -2."),
    (("--sample", "0", "--directions", "0"), "sample 0 with directions 0 would check nothing."),
    (("--jobs", "0"), "jobs must be 1 or more, not 0."),
])
def test_option_values_that_cannot_work(run_cli, good, args, sentence):
    """Each invalid setting value: exit 2, one sentence, before anything runs."""
    assert _said(run_cli("check", good, *args)) == (2, f"gradprobe: error: {sentence}")


def test_an_unwritable_json_path_fails_before_the_check(run_cli, tmp_path):
    """--json into a missing folder is refused before the target is even imported."""
    (tmp_path / "case.py").write_text(textwrap.dedent(GOOD) + "\nopen('imported', 'w').close()\n")
    result = run_cli("check", "case.py", "--json", "no/such/folder/r.json")
    assert _said(result) == (2, (
        "gradprobe: error: cannot write the JSON report to no/such/folder/r.json "
        "(the folder no/such/folder does not exist); name a file in a folder you can write to."))
    assert not (tmp_path / "imported").exists()


def test_a_folder_as_junit_path_fails_before_the_check(run_cli, good, tmp_path):
    """--junit naming a folder."""
    (tmp_path / "out").mkdir()
    assert _said(run_cli("check", good, "--junit", "out")) == (
        2, "gradprobe: error: cannot write the JUnit report to out (it is a folder); "
        "name a file in a folder you can write to.")


def test_a_writable_report_path_is_not_left_behind_by_the_early_check(run_cli, good, tmp_path):
    """The early check creates nothing when the check itself cannot run."""
    result = run_cli("check", good, "--junit", "r.xml", "--seed", "-1")
    assert result.exit_code == 2 and not (tmp_path / "r.xml").exists()


def test_config_unknown_key(run_cli, good, tmp_path):
    (tmp_path / "pyproject.toml").write_text("[tool.gradprobe]\ninconclusiv = 'fail'\n")
    assert _said(run_cli("check", good)) == (2, (
        f"gradprobe: error: {tmp_path / 'pyproject.toml'}: unknown key 'inconclusiv' in "
        "[tool.gradprobe]; did you mean 'inconclusive'?"))


def test_config_value_outside_the_choices(run_cli, good, tmp_path):
    (tmp_path / "pyproject.toml").write_text("[tool.gradprobe]\ninconclusive = 'maybe'\n")
    assert _said(run_cli("check", good)) == (2, (
        f"gradprobe: error: {tmp_path / 'pyproject.toml'}: [tool.gradprobe] inconclusive must "
        "be one of allow, fail, not 'maybe'."))


def test_config_negative_seed(run_cli, good, tmp_path):
    (tmp_path / "pyproject.toml").write_text("[tool.gradprobe]\nseed = -5\n")
    assert _said(run_cli("check", good)) == (
        2, "gradprobe: error: the seed must be a whole number 0 or more, not -5.")


def test_starter_refuses_to_overwrite(run_cli, tmp_path):
    (tmp_path / "mine.py").write_text("")
    assert _said(run_cli("starter", "mine.py")) == (
        2, "gradprobe: error: mine.py already exists; pass --force to overwrite it.")


def test_params_that_contain_themselves(run_cli, tmp_path):
    """A self-containing mapping is named, not an internal error."""
    (tmp_path / "loop.py").write_text(textwrap.dedent("""
        import numpy as np
        params = {"layer": {"w": np.ones(2)}}
        params["layer"]["again"] = params
        forward = lambda p, i: 0.0
        backward = lambda p, i: {}
    """))
    assert _said(run_cli("check", "loop.py")) == (2, (
        "gradprobe: error: loop.py: params contains itself at 'layer.again', so it has no end "
        "to flatten into arrays."))


def test_inputs_that_contain_themselves(run_cli, tmp_path):
    (tmp_path / "loop.py").write_text(textwrap.dedent("""
        import numpy as np
        params = {"w": np.ones(2)}
        inputs = {}
        inputs["me"] = inputs
        forward = lambda p, i: float(np.sum(p["w"]))
        backward = lambda p, i: {"w": np.ones(2)}
    """))
    assert _said(run_cli("check", "loop.py")) == (2, (
        "gradprobe: error: loop.py: inputs contains itself at 'me', so it has no end to "
        "flatten into arrays."))
