"""The per-layer table and the verdict line, with rich, fitted to the console's width.

Styling is data: a colour theme and a plain theme with the same keys. The plain theme
(no colour, ASCII rules) is used when output is not a terminal or ``NO_COLOR`` is set.
Numbers, names and indices are never split across lines: narrow consoles get short column
titles, then fewer columns (see :mod:`.columns`); only hints wrap.
"""

from __future__ import annotations

import io
import textwrap
from collections.abc import Iterable
from typing import IO

from rich import box
from rich.console import Console, ConsoleOptions, RenderableType, RenderResult
from rich.table import Table
from rich.text import Text

from ..common.classes import dataclass
from ..report.model import Report, TargetRun, TensorResult
from ..common.tensors import format_index
from ..common.wording import plural
from .columns import Column, Layout, fit
from .heatmap import maps
from .lines import expected_line, header, stack_line, verdict
from .text import change_cell, fmt, shape_text

__all__ = ["COLOUR", "PLAIN", "header", "render_text", "renderables", "run_summary", "verdict"]


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

COLUMNS = (
    Column("name", "layer / tensor", "tensor"),
    Column("shape", "shape", "shape"),
    Column("checked", "checked", "checked", "right"),
    Column("rel", "worst rel", "rel", "right"),
    Column("noise", "± noise", "±", "right"),
    Column("abs", "worst abs", "abs", "right"),
    Column("at", "at", "at"),
    Column("status", "status", "status"),
    Column("change", "vs baseline", "vs base"),
    Column("hint", "hint", "hint"),
)
DROP_ORDER = ("shape", "abs", "noise", "checked", "at")  # dropped first to last
OUTCOME_MIN = 16  # the run summary's outcome column, which wraps the sentence of a failed run




def _cells(t: TensorResult) -> dict[str, str]:
    checked = f"{t.checked}/{t.size}" if t.kind != "unknown" else "-"
    if t.directions:
        bad = sum(1 for d in t.directions if not d.ok)
        checked += f" +{len(t.directions)}dir" + (f"({bad} off)" if bad else "")
    worst = fmt(t.max_rel_error)
    if t.max_rel_error is None and t.directions:  # only directions: show their worst
        worst = fmt(max(d.rel_error for d in t.directions)) + " dir"
    return {
        "name": "  " + t.name, "shape": shape_text(t.shape), "checked": checked, "rel": worst,
        "noise": fmt(t.worst_noise), "abs": fmt(t.max_abs_error),
        "at": format_index(t.worst_index) if t.worst_index is not None else "-",
        "status": t.status.value, "hint": t.hint or t.inconclusive_reason or "",
        "change": change_cell(t),
    }


def layout(report: Report, width: int) -> tuple[Layout, list[dict[str, str]]]:
    """The columns that fit ``width``, and each tensor's cells (the baseline column only
    when the run was compared with one)."""
    rows = [_cells(t) for t in report.tensors]
    columns = tuple(c for c in COLUMNS if c.key != "change" or report.baseline is not None)
    cells = {c.key: [r[c.key] for r in rows] for c in columns}
    cells["name"] += [layer.name for layer in report.layers]
    return fit(columns, cells, width, DROP_ORDER), rows


class AtLeast:
    """A renderable drawn at least ``width`` wide: a table too wide for the console stays
    whole (the terminal wraps its lines) rather than having its numbers split."""

    def __init__(self, renderable: RenderableType, width: int) -> None:
        self.renderable, self.width = renderable, width

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield from console.render(self.renderable, options.update_width(max(options.max_width, self.width)))


class Whole:
    """A line drawn unbroken, even past the console's width (the terminal wraps it, whole)."""

    def __init__(self, text: Text) -> None:
        self.text = text

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield from console.render(self.text, options.update(no_wrap=True, overflow="ignore"))


def _wrap(text: str, width: int) -> str:
    """``text`` wrapped between words only: a word longer than ``width`` stays whole."""
    return "\n".join(textwrap.wrap(text, width, break_long_words=False, break_on_hyphens=False))


def table(report: Report, theme: Theme, width: int = 120) -> tuple[RenderableType, list[RenderableType]]:
    """The per-layer table fitted to ``width``, and the hints that go below it (if any)."""
    chosen, rows = layout(report, width)
    grid = Table(box=theme.box, show_edge=False, pad_edge=False, expand=False)
    for c in chosen.columns:
        wraps = c.key == "hint"
        grid.add_column(c.short if chosen.short_titles else c.title, justify=c.justify,  # type: ignore[arg-type]
                        no_wrap=not wraps, overflow="fold")
    cells = iter(rows)
    below: list[RenderableType] = []
    for layer in report.layers:
        grid.add_row(Text(layer.name, style=theme.style("layer")), *[""] * (len(chosen.columns) - 1))
        for t in layer.tensors:
            row = next(cells)
            grid.add_row(*[Text(row[c.key], style=theme.style(t.status.value)) if c.key == "status"
                           else Text(row[c.key], style=theme.style("fail")) if c.key == "change"
                           and t.baseline is not None and t.baseline.change.fails
                           else row[c.key] for c in chosen.columns])
            said = t.hint or t.inconclusive_reason
            if said and not chosen.hints_inline:
                label = "hint" if t.hint else "inconclusive"
                below.append(Whole(Text(_wrap(f"{label} for {t.name}: {said}", width))))
    expected = [line for t in report.tensors if (line := expected_line(t)) is not None]
    below += [Whole(Text(_wrap(f"worst of {line}", width))) for line in expected]
    return AtLeast(grid, chosen.width), below


def renderables(
    report: Report, theme: Theme, quiet: bool = False, with_maps: bool = False, width: int = 120
) -> Iterable[RenderableType]:
    style = theme.style("ok") if report.ok else theme.style("bad")
    if not quiet:
        yield Whole(Text(header(report, width), style=theme.style("dim")))
        grid, hints = table(report, theme, width)
        yield grid
        yield from hints
        if report.second_order is not None:
            from .second_terminal import block_notes, block_table

            yield AtLeast(block_table(report.second_order, theme.style, theme.box), 0)
            for said in block_notes(report.second_order):
                yield Whole(Text(_wrap(said, width)))
        if with_maps:
            yield from maps(report, colour=theme is not PLAIN, width=width)
        for note in report.notes:
            yield Whole(Text(_wrap(f"note: {note}", width), style=theme.style("note")))
    if report.second_order is not None:
        from .second_terminal import enters_line

        yield Whole(Text(_wrap(enters_line(report.second_order), width), style=style))
    line = stack_line(report)
    if line is not None:
        yield Whole(Text(_wrap(line, width), style=style))
    yield Whole(Text(verdict(report, width, named=quiet), style=style))


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
    for item in renderables(report, PLAIN, quiet, with_maps, width):
        console.print(item, crop=False)
    return "".join(line.rstrip() + "\n" for line in buffer.getvalue().splitlines())


def run_summary(runs: list[TargetRun], exit_code: int, theme: Theme) -> RenderableType:
    """One row per target of a run, and the run's exit code; target names are never split
    (on a narrow console the table is left wider than it rather than cut)."""
    grid = Table(box=theme.box, show_edge=False, pad_edge=False,
                 title=f"{plural(len(runs), 'target')}, exit code {exit_code}", title_justify="left")
    for title in ("target", "tensors", "failing"):
        grid.add_column(title, no_wrap=True, overflow="ignore")
    grid.add_column("outcome", min_width=OUTCOME_MIN, overflow="fold")  # the only column that wraps
    for run in runs:
        if run.report is None:
            why = (run.error or "").removeprefix(f"{run.target}: ")  # the target is in its column
            grid.add_row(run.target, "-", "-", Text(f"could not run: {why}" if why else "could not run",
                                                    style=theme.style("fail"), overflow="fold"))
            continue
        failing = len(run.report.failing_tensors)
        outcome = "ok" if run.report.ok else "fail"
        grid.add_row(run.target, str(len(run.report.tensors)), str(failing),
                     Text(outcome, style=theme.style("pass" if run.report.ok else "fail")))
    need = max(len(r.target) for r in runs) + len("tensors") + len("failing") + OUTCOME_MIN + 3 * 3
    return AtLeast(grid, need)
