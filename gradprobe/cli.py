"""The ``gradprobe`` command. The only place that turns outcomes into exit codes."""

from __future__ import annotations

import os
import sys
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import click
from rich.console import Console

from . import __version__
from .engine.runner import run_check
from .errors import ProbeError
from .options import METHODS, CheckOptions
from .render.json import render_json
from .render.progress import TerminalProgress
from .render.terminal import COLOUR, PLAIN, renderables
from .report import Report
from .target import load_target

EXIT_OK, EXIT_FAIL, EXIT_ERROR, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130

CHECK_HELP = """Check the backward pass of TARGET against central differences.

TARGET is a Python file (nets/mlp.py), a dotted module (nets.mlp), either followed by
:NAME for an attribute (nets/mlp.py:dense_case). The target provides forward, backward and
setup() or params; see the README for the protocol.

\b
Examples:
  gradprobe check samples/crop_yield.py
  gradprobe check samples/crop_yield_buggy.py --json report.json
  gradprobe check nets.mlp:Case --fail-above 1e-5 --seed 3
  gradprobe check samples/sensor_mixer.py --json - | jq .summary

\b
Exit codes: 0 every tensor agrees; 1 at least one tensor disagrees;
2 the check could not run (bad usage, import failure, forward/backward raised, ...).
"""


@dataclass(frozen=True)
class Output:
    """Where and how results are shown."""

    json_path: str | None
    quiet: bool
    traceback: bool
    maps: bool = False

    def stdout_free(self) -> bool:
        return self.json_path != "-"


def _console(stderr: bool = False) -> Console:
    stream = sys.stderr if stderr else sys.stdout
    plain = bool(os.environ.get("NO_COLOR")) or not stream.isatty()
    if plain:
        return Console(file=stream, no_color=True, color_system=None, force_terminal=False,
                       highlight=False, emoji=False, markup=False, width=120)
    return Console(file=stream, highlight=False, emoji=False, markup=False)


def _say_error(message: str, exc: BaseException | None, show_trace: bool) -> None:
    if show_trace and exc is not None:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    click.echo(f"gradprobe: error: {message}", err=True)


def _show(report: Report, out: Output) -> None:
    if out.json_path is not None:
        text = render_json(report)
        if out.json_path == "-":
            click.echo(text, nl=False)
        else:
            try:
                Path(out.json_path).write_text(text)
            except OSError as exc:
                raise ProbeError(f"cannot write the JSON report to {out.json_path} ({exc.strerror})") from exc
    console = _console(stderr=not out.stdout_free())
    theme = PLAIN if console.no_color else COLOUR
    quiet = out.quiet or not out.stdout_free()
    for item in renderables(report, theme, quiet=quiet, with_maps=out.maps):
        console.print(item)


def _progress() -> TerminalProgress | None:
    if not sys.stderr.isatty() or os.environ.get("CI"):
        return None
    return TerminalProgress(Console(file=sys.stderr))


def check_one(spec: str, options: CheckOptions, out: Output) -> tuple[int, Report | None]:
    """Check one target; returns its exit code and report (None when it could not run)."""
    progress = _progress()
    try:
        target = load_target(spec)
        try:
            report = run_check(target, options, progress=progress)
        finally:
            if progress is not None:
                progress.close()
        _show(report, out)
    except ProbeError as exc:
        _say_error(exc.with_target(spec).sentence(), exc, out.traceback)
        return EXIT_ERROR, None
    except KeyboardInterrupt:
        click.echo("gradprobe: interrupted; your arrays are unchanged", err=True)
        return EXIT_INTERRUPTED, None
    except Exception as exc:  # a bug in gradprobe itself, not in the user's code
        _say_error(
            f"{spec}: internal error {type(exc).__name__}: {exc} (please report it; "
            "--traceback shows where)", exc, out.traceback,
        )
        return EXIT_INTERNAL, None
    return (EXIT_OK if report.ok else EXIT_FAIL), report


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, "--version", prog_name="gradprobe", message="%(prog)s %(version)s")
def cli() -> None:
    """gradprobe: verify hand-written backward passes against central differences."""


@cli.command("check", help=CHECK_HELP)
@click.argument("target")
@click.option("--fail-above", "threshold", type=float, default=None, metavar="REL",
              help="Relative error above which a coordinate fails "
                   "[default: 1e-6 for float64 code, 1e-2 for float32].")
@click.option("--json", "json_path", metavar="PATH", default=None,
              help="Write the JSON report to PATH ('-' for standard output, then nothing else "
                   "goes there).")
@click.option("--seed", type=int, default=0, show_default=True,
              help="Seed for every random draw (grad_output, samples, directions).")
@click.option("--method", type=click.Choice(METHODS), default="central", show_default=True,
              help="Numeric derivative: central differences, Richardson extrapolation, or "
                   "the complex step.")
@click.option("--sample", type=click.IntRange(min=0), default=None, metavar="N",
              help="Check at most N coordinates per tensor, stratified over every axis plus the "
                   "largest gradients (0: directional checks only) [default: every coordinate "
                   "when the target has at most 20000; in a larger target every coordinate of "
                   "tensors up to 48 elements and 24 of larger ones].")
@click.option("--directions", type=click.IntRange(min=0), default=None, metavar="K",
              help="Random-direction checks per tensor, 2 evaluations each plus extrapolation "
                   "[default: 2 for the tensors that are sampled, else 0].")
@click.option("--jobs", "-j", type=click.IntRange(min=1), default=1, show_default=True,
              help="Evaluate perturbations in N worker processes.")
@click.option("--no-recheck", is_flag=True,
              help="Fail coordinates on the plain central difference, without re-checking them "
                   "by extrapolation first.")
@click.option("--map", "show_maps", is_flag=True,
              help="Draw a map of per-element relative error for each failing tensor.")
@click.option("--quiet", "-q", is_flag=True, help="Print only the verdict line.")
@click.option("--traceback", "show_traceback", is_flag=True,
              help="Show the full traceback when the check cannot run.")
def check_command(target: str, threshold: float | None, json_path: str | None, seed: int,
                  method: str, sample: int | None, directions: int | None, jobs: int,
                  no_recheck: bool, show_maps: bool, quiet: bool, show_traceback: bool) -> None:
    out = Output(json_path, quiet, show_traceback, show_maps)
    try:
        options = CheckOptions(threshold=threshold, seed=seed, method=method, sample=sample,
                               directions=directions, jobs=jobs, recheck=not no_recheck)
    except ProbeError as exc:
        _say_error(exc.sentence(), exc, show_traceback)
        sys.exit(EXIT_ERROR)
    code, _ = check_one(target, options, out)
    sys.exit(code)


def main(argv: list[str] | None = None) -> Any:
    return cli.main(args=argv, prog_name="gradprobe")


if __name__ == "__main__":  # pragma: no cover
    main()
