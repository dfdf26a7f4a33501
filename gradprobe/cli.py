"""The ``gradprobe`` command. The only place that turns outcomes into exit codes."""

from __future__ import annotations

import contextlib
import os
import socket
import sys
import traceback
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import click
from click.core import ParameterSource
from rich.console import Console

from . import __version__
from .config import ProjectConfig, load_config
from .errors import ProbeError, UsageProblem
from .options import METHODS, CheckOptions
from .render.html import render_html
from .render.json import render_runs
from .render.junit import render_junit
from .render.progress import TerminalProgress
from .render.terminal import COLOUR, PLAIN, plain_console, renderables, run_summary
from .report import TargetRun
from .report_files import check_writable, reproduce
from .stack import load_any
from .stack_check import run_any
from .starter import write_starter

EXIT_OK, EXIT_FAIL, EXIT_ERROR, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130

CHECK_HELP = """Check the backward pass of each TARGET against central differences.

TARGET is a Python file (nets/mlp.py), a dotted module (nets.mlp), either followed by
:NAME for an attribute (nets/mlp.py:dense_case). The target provides forward, backward and
setup() or params, or layers (a stack: every layer's backward is checked on its own, and the
report says where the error enters); see the README for the protocol. With no TARGET, the targets listed in
[tool.gradprobe] of the nearest pyproject.toml are checked; its other keys (threshold, seed,
method, sample, directions, jobs, recheck, json, junit, html) set defaults that options override.
--show-settings says which value each setting has and where it came from.

\b
Examples:
  gradprobe check samples/crop_yield.py
  gradprobe check samples/crop_yield_buggy.py --json report.json --junit report.xml
  gradprobe check samples/shop_demand_stack_buggy.py
  gradprobe check samples/crop_yield.py samples/crop_yield_buggy.py --html report.html
  gradprobe check nets.mlp:Case --fail-above 1e-5 --seed 3
  gradprobe check samples/sensor_mixer.py --json - | jq .summary
  gradprobe check big_model.py --sample 0 --jobs 2
  gradprobe check --show-settings

\b
Exit codes: 0 every tensor agrees; 1 at least one tensor disagrees;
2 the check could not run (bad usage, import failure, forward/backward raised, ...);
with several targets, the worst of their codes.
"""

# option name -> CheckOptions field (None: an output setting)
SETTINGS = {
    "threshold": "threshold", "seed": "seed", "method": "method", "sample": "sample",
    "directions": "directions", "jobs": "jobs", "recheck": "recheck",
    "json": None, "junit": None, "html": None,
}
DEFAULTS = {"threshold": None, "seed": 0, "method": "central", "sample": None,
            "directions": None, "jobs": 1, "recheck": True, "json": None, "junit": None,
            "html": None}


@dataclass(frozen=True)
class Output:
    """Where and how results are shown."""

    json_path: str | None
    junit_path: str | None
    quiet: bool
    traceback: bool
    maps: bool = False
    html_path: str | None = None

    def stdout_free(self) -> bool:
        return self.json_path != "-"


def _console(stderr: bool = False) -> Console:
    stream = sys.stderr if stderr else sys.stdout
    if os.environ.get("NO_COLOR") or not stream.isatty():
        columns = os.environ.get("COLUMNS", "")
        return plain_console(stream, int(columns) if columns.isdigit() and int(columns) >= 20 else 120)
    return Console(file=stream, highlight=False, emoji=False, markup=False)


def _say_error(message: str, exc: BaseException | None, show_trace: bool) -> None:
    if show_trace and exc is not None:
        traceback.print_exception(type(exc), exc, exc.__traceback__, file=sys.stderr)
    click.echo(f"gradprobe: error: {message}", err=True)


def _progress() -> TerminalProgress | None:
    if not sys.stderr.isatty() or os.environ.get("CI"):
        return None
    return TerminalProgress(Console(file=sys.stderr))


def _write(path: str, text: str, what: str) -> None:
    try:
        Path(path).write_text(text)
    except OSError as exc:
        raise UsageProblem(f"cannot write the {what} to {path} ({exc.strerror})", value=path) from exc


def check_one(spec: str, options: CheckOptions, out: Output) -> TargetRun:
    """Check one target and show its table; errors become a TargetRun with exit code 2.

    With ``--json -`` whatever the user's code prints goes to standard error, so standard
    output holds the report alone. Ctrl-C propagates to stop the whole run.
    """
    progress = _progress()
    user_output = (contextlib.redirect_stdout(sys.stderr) if not out.stdout_free()
                   else contextlib.nullcontext())
    try:
        try:
            with user_output:
                report = run_any(load_any(spec), options, progress=progress)
        finally:
            if progress is not None:
                progress.close()
    except ProbeError as exc:
        sentence = exc.with_target(spec).sentence()
        _say_error(sentence, exc, out.traceback)
        return TargetRun(spec, EXIT_ERROR, error=sentence)
    except Exception as exc:  # a bug in gradprobe itself, not in the user's code
        sentence = (f"{spec}: internal error {type(exc).__name__}: {exc} (please report it; "
                    "--traceback shows where)")
        _say_error(sentence, exc, out.traceback)
        return TargetRun(spec, EXIT_INTERNAL, error=sentence)
    console = _console(stderr=not out.stdout_free())
    theme = PLAIN if console.no_color else COLOUR
    quiet = out.quiet or not out.stdout_free()
    for item in renderables(report, theme, quiet=quiet, with_maps=out.maps, width=console.width):
        console.print(item, crop=False)
    return TargetRun(spec, EXIT_OK if report.ok else EXIT_FAIL, report=report)


def _settings(ctx: click.Context, given: dict[str, Any], config: ProjectConfig) -> tuple[dict, dict]:
    """Effective values and where each came from: command line > pyproject.toml > default."""
    values, origins = {}, {}
    for name in SETTINGS:
        if ctx.get_parameter_source(name) == ParameterSource.COMMANDLINE:
            values[name], origins[name] = given[name], "command line"
        elif name in config.values:
            values[name], origins[name] = config.values[name], str(config.path)
        else:
            values[name], origins[name] = DEFAULTS[name], "default"
    return values, origins


def _settings_lines(values: dict, origins: dict, targets: list[str], target_origin: str) -> list[str]:
    rows = [(name, "(from the floating type)" if name == "threshold" and values[name] is None
             else "(by tensor size)" if values[name] is None and name in ("sample", "directions")
             else repr(values[name]), origins[name]) for name in SETTINGS]
    rows.append(("targets", repr(targets), target_origin))
    width = max(len(r[0]) for r in rows)
    value_width = max(len(r[1]) for r in rows)
    lines = [f"{'setting'.ljust(width)}  {'value'.ljust(value_width)}  from"]
    lines += [f"{name.ljust(width)}  {value.ljust(value_width)}  {origin}" for name, value, origin in rows]
    return lines


class CheckCommand(click.Command):
    """``check``, whose help also lists the settings in force when --show-settings is given."""

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        ctx.meta["gradprobe.show_settings"] = "--show-settings" in args
        return super().parse_args(ctx, args)

    def format_help(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        super().format_help(ctx, formatter)
        if not ctx.meta.get("gradprobe.show_settings"):
            return
        try:
            config = load_config(Path.cwd())
        except ProbeError as exc:
            formatter.write_paragraph()
            formatter.write_text(f"Settings: {exc.sentence()}")
            return
        values = {n: config.values.get(n, DEFAULTS[n]) for n in SETTINGS}
        origins = {n: str(config.path) if n in config.values else "default" for n in SETTINGS}
        targets = config.targets(Path.cwd())
        with formatter.section("Settings in force (before any option on this command line)"):
            for line in _settings_lines(values, origins, targets, str(config.path) if targets else "none"):
                formatter.write(" " * formatter.current_indent + line + "\n")


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, "--version", prog_name="gradprobe", message="%(prog)s %(version)s")
def cli() -> None:
    """gradprobe: verify hand-written backward passes against central differences."""


@cli.command("check", cls=CheckCommand, help=CHECK_HELP)
@click.argument("targets", nargs=-1, metavar="[TARGET]...")
@click.option("--fail-above", "threshold", type=float, default=None, metavar="REL",
              help="Relative error above which a coordinate fails "
                   "[default: 1e-6 for float64 code, 1e-2 for float32].")
@click.option("--json", "json", metavar="PATH", default=None,
              help="Write the JSON report to PATH ('-' for standard output, then nothing else "
                   "goes there).")
@click.option("--junit", "junit", metavar="PATH", default=None,
              help="Write a JUnit XML report to PATH: a testsuite per target, a testcase per tensor.")
@click.option("--html", "html", metavar="PATH", default=None,
              help="Write one self-contained HTML page for the whole run to PATH: verdict, "
                   "settings, tables and a map of relative error for each failing tensor.")
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
@click.option("--recheck/--no-recheck", default=True, show_default=True,
              help="Re-check coordinates that fail the central difference by extrapolation "
                   "before failing them.")
@click.option("--map", "show_maps", is_flag=True,
              help="Draw a map of per-element relative error for each failing tensor.")
@click.option("--quiet", "-q", is_flag=True, help="Print only the verdict line.")
@click.option("--traceback", "show_traceback", is_flag=True,
              help="Show the full traceback when the check cannot run.")
@click.option("--show-settings", is_flag=True,
              help="Print every setting's value and where it came from (command line, "
                   "pyproject.toml or default), then stop; with --help, list them under it.")
@click.pass_context
def check_command(ctx: click.Context, targets: tuple[str, ...], show_maps: bool, quiet: bool,
                  show_traceback: bool, show_settings: bool, **given: Any) -> None:
    try:
        config = load_config(Path.cwd())
        values, origins = _settings(ctx, given, config)
        chosen = list(targets) or config.targets(Path.cwd())
        target_origin = "command line" if targets else str(config.path) if chosen else "none"
        if show_settings:
            click.echo("\n".join(_settings_lines(values, origins, chosen, target_origin)))
            sys.exit(EXIT_OK)
        if not chosen:
            raise UsageProblem("no TARGET given and no targets in [tool.gradprobe] of a "
                               "pyproject.toml here or above (see gradprobe check --help)")
        options = CheckOptions(**{field: values[name] for name, field in SETTINGS.items() if field})
        if values["html"] is not None:
            check_writable(values["html"], "HTML report")
    except ProbeError as exc:
        _say_error(exc.sentence(), exc, show_traceback)
        sys.exit(EXIT_ERROR)
    out = Output(values["json"], values["junit"], quiet, show_traceback, show_maps, values["html"])
    try:
        runs = [check_one(spec, options, out) for spec in chosen]
    except KeyboardInterrupt:
        click.echo("gradprobe: interrupted; your arrays are unchanged", err=True)
        sys.exit(EXIT_INTERRUPTED)
    code = max(run.exit_code for run in runs)
    try:
        if out.json_path is not None and any(r.report for r in runs):
            text = render_runs(runs)
            if out.json_path == "-":
                click.echo(text, nl=False)
            else:
                _write(out.json_path, text, "JSON report")
        stamp = datetime.now().replace(microsecond=0).isoformat()
        if out.junit_path is not None:
            _write(out.junit_path, render_junit(runs, stamp, socket.gethostname()), "JUnit report")
        if out.html_path is not None:
            _write(out.html_path, render_html(runs, reproduce(chosen, values, DEFAULTS), stamp), "HTML report")
    except ProbeError as exc:
        _say_error(exc.sentence(), exc, show_traceback)
        code = max(code, EXIT_ERROR)
    if len(runs) > 1:
        console = _console(stderr=not out.stdout_free())
        console.print(run_summary(runs, code, PLAIN if console.no_color else COLOUR), crop=False)
    sys.exit(code)


@cli.command("starter")
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--force", is_flag=True, help="Overwrite PATH if it exists.")
@click.option("--stack", is_flag=True,
              help="Write a stack of layers, each with its own backward, instead of one "
                   "forward and backward.")
def starter_command(path: str, force: bool, stack: bool) -> None:
    """Write a commented starter target to PATH that runs as it is.

    Replace its small layer (or, with --stack, its layers) with your own forward and
    backward, then run gradprobe check PATH.
    """
    try:
        write_starter(Path(path), force, stack)
    except ProbeError as exc:
        _say_error(exc.sentence(), exc, False)
        sys.exit(EXIT_ERROR)
    click.echo(f"wrote {path}; run: gradprobe check {path}")


def main(argv: list[str] | None = None) -> Any:
    return cli.main(args=argv, prog_name="gradprobe")


if __name__ == "__main__":  # pragma: no cover
    main()
