"""The per-layer table and the verdict line, with rich.

Styling is data: a colour theme and a plain theme with the same keys. The plain theme
(no colour, ASCII rules) is used when output is not a terminal or ``NO_COLOR`` is set.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from typing import IO, Iterable

from rich import box
from rich.console import Console, RenderableType
from rich.table import Table
from rich.text import Text

from ..report import Report, TargetRun, TensorResult
from ..tensors import format_index
from .heatmap import maps
from .text import fmt, header, shape_text, verdict


@dataclass(frozen=True)
class Theme:
    box: box.Box
    styles: dict[str, str]

    def style(self, key: str) -> str:
        return self.styles.get(key, "")


COLOUR = Theme(
    box=box.SIMPLE_HEAD,
    styles={
        "pass": "green", "kink": "cyan", "inconclusive": "yellow", "fail": "bold red",
        "layer": "bold", "dim": "dim", "ok": "bold green", "bad": "bold red", "note": "yellow",
    },
)
# Only a rule under the header, in ASCII, so plain output pastes cleanly into logs.
RULED = box.Box("    \n    \n -- \n    \n    \n    \n    \n    \n", ascii=True)
PLAIN = Theme(box=RULED, styles={})


def _row(t: TensorResult, theme: Theme) -> list[Text | str]:
    checked = f"{t.checked}/{t.size}" if t.kind != "unknown" else "-"
    if t.directions:
        bad = sum(1 for d in t.directions if not d.ok)
        checked += f" +{len(t.directions)}dir" + (f"({bad} off)" if bad else "")
    where = format_index(t.worst_index) if t.worst_index is not None else "-"
    worst = fmt(t.max_rel_error)
    if t.max_rel_error is None and t.directions:  # only directions: show their worst
        worst = fmt(max(d.rel_error for d in t.directions)) + " dir"
    return [
        Text("  " + t.name),
        shape_text(t.shape),
        checked,
        worst,
        fmt(t.worst_noise),
        fmt(t.max_abs_error),
        where,
        Text(t.status.value, style=theme.style(t.status.value)),
        t.hint or "",
    ]


def table(report: Report, theme: Theme) -> Table:
    grid = Table(box=theme.box, show_edge=False, pad_edge=False, expand=False)
    for title, justify in (
        ("layer / tensor", "left"), ("shape", "left"), ("checked", "right"),
        ("worst rel", "right"), ("± noise", "right"), ("worst abs", "right"), ("at", "left"),
        ("status", "left"), ("hint", "left"),
    ):
        grid.add_column(title, justify=justify, overflow="fold")  # type: ignore[arg-type]
    for layer in report.layers:
        grid.add_row(Text(layer.name, style=theme.style("layer")), *[""] * 8)
        for t in layer.tensors:
            grid.add_row(*_row(t, theme))
    return grid


def renderables(
    report: Report, theme: Theme, quiet: bool = False, with_maps: bool = False
) -> Iterable[RenderableType]:
    style = theme.style("ok") if report.ok else theme.style("bad")
    if not quiet:
        yield Text(header(report), style=theme.style("dim"))
        yield table(report, theme)
        if with_maps:
            yield from maps(report, colour=theme is not PLAIN)
        for note in report.notes:
            yield Text(f"note: {note}", style=theme.style("note"))
    yield Text(verdict(report), style=style)


def plain_console(file: IO[str], width: int = 120) -> Console:
    return Console(
        file=file, width=width, no_color=True, color_system=None, force_terminal=False,
        highlight=False, emoji=False, markup=False, soft_wrap=False,
    )


def render_text(
    report: Report, width: int = 120, quiet: bool = False, with_maps: bool = False
) -> str:
    """The report as plain text (no colour), e.g. for pytest messages and logs."""
    buffer = io.StringIO()
    console = plain_console(buffer, width)
    for item in renderables(report, PLAIN, quiet, with_maps):
        console.print(item)
    return "".join(line.rstrip() + "\n" for line in buffer.getvalue().splitlines())


def run_summary(runs: list[TargetRun], exit_code: int, theme: Theme) -> Table:
    """One row per target of a run, and the run's exit code."""
    grid = Table(box=theme.box, show_edge=False, pad_edge=False,
                 title=f"{len(runs)} targets, exit code {exit_code}", title_justify="left")
    for title in ("target", "tensors", "failing", "outcome"):
        grid.add_column(title, overflow="fold")
    for run in runs:
        if run.report is None:
            grid.add_row(run.target, "-", "-", Text(run.error or "could not run", style=theme.style("fail")))
            continue
        failing = len(run.report.blocking_tensors)
        outcome = "ok" if run.report.ok else "fail"
        grid.add_row(run.target, str(len(run.report.tensors)), str(failing),
                     Text(outcome, style=theme.style("pass" if run.report.ok else "fail")))
    return grid
