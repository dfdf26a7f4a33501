"""The grad_probe fixture, run through pytest's own pytester."""

from __future__ import annotations

import re
from pathlib import Path

import numpy  # noqa: F401 - loaded once here: in-process inner runs must not import it again
import pytest

README = Path(__file__).resolve().parent.parent / "README.md"
# Inner runs load gradprobe's plugin only: other installed plugins (hypothesis's costs seconds
# per run) have nothing to do with these tests.
QUIET_PLUGINS = ("-p", "no:cacheprovider", "-p", "no:hypothesispytest")


def _run(pytester: pytest.Pytester, *args: str) -> pytest.RunResult:
    return pytester.runpytest(*QUIET_PLUGINS, *args)

LAYER = """
import numpy as np

W = np.array([[0.5, -1.0], [2.0, 0.25], [0.1, 0.3]])
X = np.array([[1.0, 2.0, -1.0], [0.5, 0.0, 3.0]])

def forward(p, i):
    return float(np.sum(np.tanh(i["x"] @ p["W"])))

def backward(p, i, scale=1.0):
    return {"W": scale * i["x"].T @ (1 - np.tanh(i["x"] @ p["W"]) ** 2)}
"""


def test_a_passing_check_returns_the_report(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
def test_layer(grad_probe):
    report = grad_probe(forward, backward, {"W": W}, {"x": X})
    assert report.ok and report.tensor("W").checked == 6
""")
    _run(pytester).assert_outcomes(passed=1)


def test_a_failing_check_fails_with_the_per_layer_report(pytester: pytest.Pytester, monkeypatch):
    """The message's first line names the tensor and its worst error; the table follows."""
    monkeypatch.setenv("COLUMNS", "200")  # so the short summary line is not cut
    pytester.makepyfile(LAYER + """
def test_layer(grad_probe):
    grad_probe(forward, lambda p, i: backward(p, i, scale=-1.0), {"W": W}, {"x": X})
""")
    result = _run(pytester)
    result.assert_outcomes(failed=1)
    first = "W disagrees: rel error 2.0e+00 at [0, 0] > 1e-06 (backward gave "  # then the values
    lines = result.stdout.lines
    start = lines.index(next(line for line in lines if line.startswith("____") and "test_layer" in line))
    assert lines[start + 1].startswith(first)
    gave, numeric = [float(v) for v in lines[start + 1][len(first):-1].split(", numeric ")]
    assert gave == pytest.approx(-numeric, rel=1e-5)  # the sign-flipped backward, said plainly
    assert lines[start + 2].startswith("gradprobe · test_layer · central")  # named after the test
    result.stdout.fnmatch_lines(["*W*fail*analytic is -1 x numeric: the sign is flipped"])
    assert any(line.startswith("FAILED ") and f"::test_layer - Failed: {first}" in line
               for line in lines)
    assert "pytest_plugin.py" not in result.stdout.str()  # no traceback into gradprobe


def test_several_failing_tensors_are_all_named_with_the_worst(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
def test_pair(grad_probe):
    def both(p, i):
        g = backward(p, i)["W"]
        return {"W": 1.5 * g, "V": 3.0 * p["V"]}
    grad_probe(lambda p, i: forward(p, i) + float((p["V"] ** 2).sum()), both,
               {"W": W, "V": W[:2] + 1.0}, {"x": X})
""")
    result = _run(pytester)
    result.assert_outcomes(failed=1)
    # V's analytic is 3V against the numeric 2V: rel error |3-2|/3 = 3.3e-01; W's 1.5 g: 0.5/1.5
    result.stdout.fnmatch_lines(["W, V disagree: rel error 3.3e-01 in * at [[]*[]] > 1e-06 (backward gave *, numeric *)"])


def test_a_check_that_cannot_run_shows_the_users_frame_not_gradprobes(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
def broken_forward(p, i):
    raise ValueError("the batch has no rows")

def test_broken(grad_probe):
    grad_probe(broken_forward, backward, {"W": W}, {"x": X})
""")
    result = _run(pytester)
    result.assert_outcomes(failed=1)
    text = result.stdout.str()
    result.stdout.fnmatch_lines(['*raise ValueError("the batch has no rows")',
                                 "*UserCodeError: test_broken: forward raised ValueError: the batch has no rows; *"])
    assert "gradprobe/" not in text.replace("gradprobe/errors", "")  # no frame inside gradprobe


def test_threshold_from_the_command_line_ini_marker_and_call(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
import pytest

def off(p, i):
    return backward(p, i, scale=1 + 1e-4)

def test_cli_or_ini(grad_probe):
    grad_probe(forward, off, {"W": W}, {"x": X})

@pytest.mark.gradprobe(threshold=1e-3)
def test_marker(grad_probe):
    grad_probe(forward, off, {"W": W}, {"x": X})

def test_call(grad_probe):
    grad_probe(forward, off, {"W": W}, {"x": X}, threshold=1e-3)
""")
    _run(pytester).assert_outcomes(passed=2, failed=1)
    _run(pytester, "--gradprobe-threshold", "1e-3").assert_outcomes(passed=3)
    pytester.makeini("[pytest]\ngradprobe_threshold = 1e-3\n")
    _run(pytester).assert_outcomes(passed=3)
    # the command line beats the ini file
    _run(pytester, "--gradprobe-threshold", "1e-6").assert_outcomes(passed=2, failed=1)


def test_seed_is_in_the_header_and_reaches_the_check(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
def test_seed(grad_probe):
    assert grad_probe(forward, backward, {"W": W}, {"x": X}).seed == 7
""")
    result = _run(pytester, "--gradprobe-seed", "7")
    result.assert_outcomes(passed=1)
    result.stdout.fnmatch_lines(["gradprobe: threshold by floating type, seed 7"])


def test_a_check_that_cannot_run_raises_gradprobes_error(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
import pytest
from gradprobe import UserCodeError

def test_raises(grad_probe):
    def broken(p, i):
        raise ZeroDivisionError("empty batch")
    with pytest.raises(UserCodeError, match="backward raised ZeroDivisionError: empty batch") as info:
        grad_probe(forward, broken, {"W": W}, {"x": X})
    assert isinstance(info.value.__cause__, ZeroDivisionError)
""")
    _run(pytester).assert_outcomes(passed=1)


def test_the_readme_example_runs_and_is_under_ten_lines(pytester: pytest.Pytester):
    text = README.read_text()
    example = re.search(r"<!-- pytest-example -->\s*```python\n(.*?)```", text, re.DOTALL).group(1)
    assert len([line for line in example.splitlines() if line.strip()]) < 10
    pytester.makepyfile(test_readme=example)
    _run(pytester).assert_outcomes(passed=1)


def test_inconclusive_fail_reaches_the_fixture_from_the_command_line(pytester: pytest.Pytester):
    pytester.makepyfile(LAYER + """
def test_layer(grad_probe):
    report = grad_probe(forward, backward, {"W": W}, {"x": X})
    assert report.inconclusive_fails
""")
    result = _run(pytester, "--gradprobe-inconclusive", "fail")
    result.assert_outcomes(passed=1)
    assert "gradprobe: threshold by floating type, seed 0, inconclusive fail" in result.outlines


def test_inconclusive_fail_from_the_ini_file(pytester: pytest.Pytester):
    pytester.makeini("[pytest]\ngradprobe_inconclusive = fail\n")
    pytester.makepyfile(LAYER + """
def test_layer(grad_probe):
    assert grad_probe(forward, backward, {"W": W}, {"x": X}).inconclusive_fails
""")
    _run(pytester).assert_outcomes(passed=1)


def test_the_fixture_type_is_exported():
    import gradprobe
    from gradprobe.pytest_plugin import grad_probe  # noqa: F401 - the plugin still loads

    assert gradprobe.GradProbe.__module__ == "gradprobe.fixture"
