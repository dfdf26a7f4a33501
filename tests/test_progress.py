"""The progress bar: silent for short checks, drawn on a terminal after about a second."""

from __future__ import annotations

import io

from rich.console import Console

from gradprobe.render.progress import TerminalProgress


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def _progress():
    buffer = io.StringIO()
    console = Console(file=buffer, force_terminal=True, width=100)
    clock = Clock()
    return TerminalProgress(console, clock=clock), clock, buffer


def test_nothing_is_drawn_in_the_first_second():
    progress, clock, buffer = _progress()
    progress.planned(100)
    clock.now = 0.5
    progress.done(40)
    progress.close()
    assert buffer.getvalue() == ""


def test_a_bar_with_counts_and_rate_after_a_second():
    progress, clock, buffer = _progress()
    progress.planned(100)
    clock.now = 2.0
    progress.done(50)
    progress._bar.refresh()
    shown = buffer.getvalue()
    progress.close()
    assert "50/100" in shown and "~25 coordinates" in shown and "25/s" in shown


def test_the_cli_draws_no_bar_when_stderr_is_not_a_terminal(run_cli):
    from conftest import SAMPLES

    result = run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--json", "-")
    assert "evaluations  ~" not in result.stderr
