"""Where the ``gradprobe`` command writes: its consoles (plain where output is not a
terminal), error sentences, progress, and report files. No exit codes here (cli.py decides
them)."""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from ..common.classes import dataclass
from ..common.errors import UsageProblem
from ..settings.options import ReportFiles

if TYPE_CHECKING:
    from rich.console import Console


@dataclass(frozen=True)
class Output:
    """Where and how results are shown."""

    files: ReportFiles
    quiet: bool
    traceback: bool
    maps: bool = False
    command: str = ""  # the command line that reproduces the run (for the HTML page)

    def stdout_free(self) -> bool:
        return self.files.json != "-"


def console_for(stderr: bool = False) -> Console:
    from rich.console import Console

    from .terminal import plain_console

    stream = sys.stderr if stderr else sys.stdout
    if os.environ.get("NO_COLOR") or not stream.isatty():
        columns = os.environ.get("COLUMNS", "")
        return plain_console(stream, int(columns) if columns.isdigit() and int(columns) >= 20 else 120)
    return Console(file=stream, highlight=False, emoji=False, markup=False)


def say_error(message: str, exc: BaseException | None, show_trace: bool) -> None:
    if show_trace and exc is not None:
        import traceback  # local: only a failed check asked to show it needs it

        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    click.echo(f"gradprobe: error: {message}", err=True)


def progress_display() -> Any:
    if not sys.stderr.isatty() or os.environ.get("CI"):
        return None
    from rich.console import Console

    from .progress import TerminalProgress

    return TerminalProgress(Console(file=sys.stderr))


def writable(path: str, what: str) -> None:
    """Refuse a report path that cannot be written, before any check runs ('-' is standard
    output for the JSON report)."""
    if path == "-" and what == "JSON report":
        return
    from ..settings.report_files import check_writable

    check_writable(path, what)


def write_report(path: str, text: str, what: str) -> None:
    try:
        Path(path).write_text(text)
    except OSError as exc:
        raise UsageProblem(f"cannot write the {what} to {path} ({exc.strerror})", value=path) from exc


def show(console: Console, items: Any) -> None:
    """Print rich renderables; plain output (a pipe, a log) without the trailing spaces that
    tables pad their cells with."""
    if not console.no_color or console.is_terminal:
        for item in items:
            console.print(item, crop=False)
        return
    with console.capture() as captured:
        for item in items:
            console.print(item, crop=False)
    console.file.write("".join(line.rstrip() + "\n" for line in captured.get().splitlines()))
