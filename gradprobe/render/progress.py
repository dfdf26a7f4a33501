"""A progress bar on standard error for checks that run longer than about a second."""

from __future__ import annotations

import time
from collections.abc import Callable

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeRemainingColumn,
)

DELAY = 1.0  # seconds before the bar appears


class TerminalProgress:
    """Counts planned and finished evaluations; draws a bar once the check has run for DELAY s."""

    def __init__(self, console: Console, clock: Callable[[], float] = time.monotonic) -> None:
        self.console = console
        self.clock = clock
        self.started = clock()
        self.total = 0
        self.completed = 0
        self._bar: Progress | None = None
        self._task: TaskID | None = None

    def planned(self, evaluations: int) -> None:
        self.total += evaluations

    def done(self, evaluations: int) -> None:
        self.completed += evaluations
        now = self.clock()
        if self._bar is None:
            if now - self.started < DELAY:
                return
            self._bar = Progress(
                TextColumn("gradprobe"), BarColumn(), MofNCompleteColumn(),
                TextColumn("evaluations  ~{task.fields[coords]} coordinates  {task.fields[rate]}/s"),
                TimeRemainingColumn(), console=self.console, transient=True,
            )
            self._bar.start()
            self._task = self._bar.add_task("check", total=self.total, coords=0, rate="-")
        assert self._task is not None
        rate = self.completed / max(now - self.started, 1e-9)
        self._bar.update(self._task, total=self.total, completed=self.completed,
                         coords=self.completed // 2, rate=f"{rate:.0f}")

    def close(self) -> None:
        if self._bar is not None:
            self._bar.stop()
