"""Settings: declared once, derived everywhere, validated with one sentence."""

from __future__ import annotations

import pytest

from gradprobe import CheckOptions, UsageProblem, probe
from gradprobe.settings.config import KEYS
from gradprobe.settings.options import SETTINGS, ReportFiles, split_values


def test_every_setting_is_a_config_key():
    """The [tool.gradprobe] keys are the settings plus the targets list."""
    assert set(KEYS) == {s.config_key for s in SETTINGS} | {"targets"}


def test_every_setting_is_a_command_line_option():
    from gradprobe.cli import check_command

    options = {p.name for p in check_command.params}
    assert {s.name for s in SETTINGS} <= options


def test_defaults_come_from_the_dataclasses():
    defaults = {s.name: s.default for s in SETTINGS}
    options, files = split_values(defaults)
    assert options == CheckOptions() and files == ReportFiles()


def test_the_fixture_settings():
    assert [s.name for s in SETTINGS if s.fixture] == ["threshold", "seed", "method", "inconclusive", "baseline",
                                                    "baseline_growth", "second_order"]


def test_a_negative_seed_in_the_api_is_a_usage_problem():
    """Item: --seed -5 was an internal error and a bare ValueError in the API."""
    with pytest.raises(UsageProblem) as info:
        probe(lambda p, i: 0.0, lambda p, i: {}, {"w": [1.0]}, seed=-5)
    assert str(info.value) == "the seed must be a whole number 0 or more, not -5."


def test_a_non_integer_seed_is_a_usage_problem():
    with pytest.raises(UsageProblem) as info:
        CheckOptions(seed=1.5)  # type: ignore[arg-type]
    assert str(info.value) == "the seed must be a whole number 0 or more, not 1.5."


def test_an_unknown_inconclusive_policy():
    with pytest.raises(UsageProblem) as info:
        CheckOptions(inconclusive="ignore")
    assert str(info.value) == "inconclusive must be one of allow, fail, not 'ignore'."


def test_an_unknown_keyword_lists_the_settings():
    with pytest.raises(UsageProblem) as info:
        CheckOptions().with_values(sed=1)
    assert str(info.value) == (
        "unknown option 'sed'; known: baseline, baseline_growth, directions, inconclusive, jobs, "
        "method, only, recheck, sample, second_order, seed, skip, threshold.")


def test_inconclusive_fail_reaches_the_report(tmp_path):
    w = [0.5, -1.0]
    report = probe(lambda p, i: float(sum(p["w"] ** 2)), lambda p, i: {"w": 2 * p["w"]},
                   {"w": w}, inconclusive="fail")
    assert report.inconclusive_fails and report.ok


def test_settings_in_force_lists_inconclusive_from_the_config(run_cli, tmp_path):
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\ninconclusive = "fail"\n')
    result = run_cli("check", "--settings-in-force")
    line = next(x for x in result.output.splitlines() if x.startswith("inconclusive"))
    assert line.split()[:2] == ["inconclusive", "'fail'"] and line.endswith("pyproject.toml")


def test_the_json_report_says_whether_inconclusive_fails(run_cli, tmp_path):
    import json

    (tmp_path / "case.py").write_text(
        "import numpy as np\nparams = {'w': np.array([0.5])}\n"
        "forward = lambda p, i: float(np.sum(p['w'] ** 2))\n"
        "backward = lambda p, i: {'w': 2 * p['w']}\n")
    result = run_cli("check", "case.py", "--inconclusive", "fail", "--json", "-")
    assert result.exit_code == 0 and json.loads(result.stdout)["inconclusive_fails"] is True
