"""Shared helpers: writing throw-away target files and running the CLI in-process."""

from __future__ import annotations

import textwrap
from collections.abc import Callable
from pathlib import Path

import pytest
from click.testing import CliRunner

from gradprobe.cli import cli

pytest_plugins = ["pytester"]

SAMPLES = Path(__file__).resolve().parent.parent / "samples"


@pytest.fixture
def write_target(tmp_path: Path) -> Callable[[str, str], Path]:
    """Write a target module ``name`` with ``source`` (dedented) and return its path."""

    def write(source: str, name: str = "case.py") -> Path:
        path = tmp_path / name
        path.write_text(textwrap.dedent(source))
        return path

    return write


@pytest.fixture
def run_cli(monkeypatch: pytest.MonkeyPatch, tmp_path: Path):
    """Invoke ``gradprobe`` in-process from ``tmp_path``; returns click's Result."""
    monkeypatch.chdir(tmp_path)

    def run(*args: str):
        return CliRunner().invoke(cli, list(args), catch_exceptions=False)

    return run
