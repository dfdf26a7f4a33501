"""The README's examples come from runs: every terminal block that starts with gradprobe's header
line is what the command prints today, and the JSON example names the keys a report has and
the figures a run of its target gives."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from gradprobe.cli import cli

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text()
BLOCKS = re.findall(r"```[a-z]*\n(.*?)```", README, flags=re.S)
TABLES = [b for b in BLOCKS if b.startswith("gradprobe · samples/")]
SECONDS = re.compile(r"in \d+\.\d\d s")


def _run(*args: str) -> str:
    result = CliRunner().invoke(cli, ["check", *args], env={"COLUMNS": "120", "NO_COLOR": "1"})
    return result.stdout


def test_the_readme_has_terminal_examples():
    assert len(TABLES) >= 2


@pytest.mark.parametrize("block", TABLES, ids=[b.split(" · ")[1] for b in TABLES])
def test_a_terminal_example_is_what_the_command_prints(monkeypatch, block):
    monkeypatch.chdir(ROOT)
    target = block.split(" · ")[1]
    printed = _run(target)
    assert SECONDS.sub("in _ s", printed) == SECONDS.sub("in _ s", block)


def _keys(value: object) -> set[str]:
    if isinstance(value, dict):
        return set(value) | {k for v in value.values() for k in _keys(v)}
    if isinstance(value, list):
        return {k for v in value for k in _keys(v)}
    return set()


def test_the_json_example_has_the_keys_and_figures_of_a_real_report(monkeypatch):
    monkeypatch.chdir(ROOT)
    example = next(b for b in BLOCKS if b.lstrip().startswith('{\n  "schema": "gradprobe.report/1"'))
    target = re.search(r'"target": "([^"]+)"', example).group(1)
    real = json.loads(_run(target, "--json", "-"))
    shown = set(re.findall(r'"(\w+)":', example))
    assert shown <= _keys(real), shown - _keys(real)  # no key the report lacks
    tensor = next(t for layer in real["layers"] for t in layer["tensors"] if t["status"] == "fail")
    assert set(tensor) <= shown, set(tensor) - shown  # every key a tensor has is shown
    assert set(real) <= shown, set(real) - shown
    for key in ("tensors", "checked", "failed", "kinks", "evaluations"):
        said = re.search(rf'"{key}": (\d+)', example.split('"summary"')[1]).group(1)
        assert int(said) == real["summary"][key], key
