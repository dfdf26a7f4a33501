"""The ``gradprobe`` command. The only place that turns outcomes into exit codes.

Every command returns its exit code; :func:`_finish` (the group's result callback) is the one
place the process exits. Errors carry their own ``exit_code``. rich, the renderers and the
engine are imported when a check runs, not when the command starts, so ``--help`` and
``--version`` are quick.
"""

from __future__ import annotations

import contextlib
import os
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from .settings.config import load_config
from .common.errors import ProbeError, UsageProblem
from .settings.options import SETTINGS, CheckOptions, split_values
from .report.model import TargetRun
from .render.console import Output, console_for, progress_display, say_error, show, writable, write_report
from .settings.command_line import (
    CheckCommand,
    effective_settings,
    setting_options,
    settings_lines,
)

if TYPE_CHECKING:
    from rich.console import Console

    from .report.baseline_file import Baseline
    from .report.model import Report

EXIT_OK, EXIT_FAIL, EXIT_INTERNAL, EXIT_INTERRUPTED = 0, 1, 3, 130  # 2: ProbeError.exit_code

CHECK_HELP = f"""Check the backward pass of each TARGET against central differences.

TARGET is a Python file (nets/mlp.py), a dotted module (nets.mlp), either followed by
:NAME for an attribute (nets/mlp.py:dense_case). The target provides forward, backward and
setup() or params, or layers (a stack: every layer's backward is checked on its own, and the
report says where the error enters); a target that also gives hvp or hessian (or, forward only
with torch or jax, second_order = True) has its second derivatives checked per block after the gradient; see the README for the protocol. With no TARGET, the targets listed in
[tool.gradprobe] of the nearest pyproject.toml are checked; its other keys
({", ".join(s.config_key for s in SETTINGS)}) set defaults that options override.
--settings-in-force says which value each setting has and where it came from.

\b
Examples:
  gradprobe check samples/crop_yield.py
  gradprobe check samples/crop_yield_buggy.py --json report.json --junit report.xml
  gradprobe check samples/shop_demand_stack_buggy.py
  gradprobe check samples/reservoir_release_buggy.py --second-order off
  gradprobe check samples/crop_yield.py samples/crop_yield_buggy.py --html report.html
  gradprobe check nets.mlp:Case --fail-above 1e-5 --seed 3
  gradprobe check samples/sensor_mixer.py --json - | jq .summary
  gradprobe check big_model.py --sample 0 --jobs 2
  gradprobe check nets.mlp:Case --inconclusive fail
  gradprobe check nets.mlp:Case --baseline main-report.json
  gradprobe check --settings-in-force

\b
Exit codes: 0 every tensor agrees; 1 at least one tensor disagrees (or is
inconclusive with --inconclusive fail, or regressed or got worse since --baseline); 2 the check could not run (bad usage,
import failure, forward/backward raised or tried to end the process, ...);
3 an internal error; 130 interrupted; with several targets, the worst code.
"""


def check_one(spec: str, options: CheckOptions, out: Output, baseline: Baseline | None = None,
              alone: bool = True, others: list[str] | None = None) -> TargetRun:
    """Check one target and show its table; errors become a TargetRun with their exit code.

    With ``--json -`` whatever the user's code prints goes to standard error, so standard
    output holds the report alone. Ctrl-C propagates to stop the whole run.
    """
    from .targets.loading import load_any
    from .engine.stack_run import run_any

    progress = progress_display()
    user_output = (contextlib.redirect_stdout(sys.stderr) if not out.stdout_free()
                   else contextlib.nullcontext())
    try:
        try:
            with user_output:
                def run(o: CheckOptions) -> Report:
                    return run_any(load_any(spec), o, progress=progress)

                if baseline is None:  # the baseline's modules load only with --baseline
                    report = run(options)
                else:
                    from .report.baseline_file import run_against

                    report = run_against(baseline, spec, options, run, alone, others)
        finally:
            if progress is not None:
                progress.close()
    except ProbeError as exc:
        sentence = exc.with_target(spec).sentence()
        say_error(sentence, exc, out.traceback)
        return TargetRun(spec, exc.exit_code, error=sentence)
    except SystemExit as exc:  # past every guard: still never a pass
        from .common.guard import exit_error

        error = exit_error(exc, "the target's code").with_target(spec)
        say_error(error.sentence(), exc, out.traceback)
        return TargetRun(spec, error.exit_code, error=error.sentence())
    except Exception as exc:  # a bug in gradprobe itself, not in the user's code
        sentence = (f"{spec}: internal error {type(exc).__name__}: {exc} (please report it; "
                    "--traceback shows where)")
        say_error(sentence, exc, out.traceback)
        return TargetRun(spec, EXIT_INTERNAL, error=sentence)
    quiet = out.quiet or not out.stdout_free()
    stream = sys.stdout if out.stdout_free() else sys.stderr
    if quiet and (os.environ.get("NO_COLOR") or not stream.isatty()):
        from .render.lines import verdict  # the verdict line alone needs no rich

        click.echo(verdict(report, named=True), file=stream)
        return TargetRun(spec, EXIT_OK if report.ok else EXIT_FAIL, report=report)
    from .render.terminal import COLOUR, PLAIN, renderables

    console = console_for(stderr=not out.stdout_free())
    theme = PLAIN if console.no_color else COLOUR
    show(console, renderables(report, theme, quiet=quiet, with_maps=out.maps, width=console.width))
    return TargetRun(spec, EXIT_OK if report.ok else EXIT_FAIL, report=report)


def usage_sentence(message: str, command: str) -> str:
    """click's usage message as one sentence of ours: lower case, its suggestion kept, else
    where to look (``no such option '--sed' (did you mean '--seed'?)``)."""
    text = message[:1].lower() + message[1:]
    text = text.replace(". (Did you mean", " (did you mean").replace(". Did you mean", "; did you mean")
    if "did you mean" in text:
        return text
    return f"{text.rstrip('.')}; see {command} --help."


class Command(click.Group):
    """The ``gradprobe`` group: a usage error is one sentence on standard error and exit 2,
    not click's usage block."""

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,
             standalone_mode: bool = True, **extra: Any) -> Any:
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, False, **extra)
        try:
            code = super().main(args, prog_name, complete_var, False, **extra)
        except click.UsageError as exc:
            sub = exc.ctx.command_path.split()[1:] if exc.ctx is not None else []
            where = " ".join(["gradprobe", *sub])
            click.echo(f"gradprobe: error: {usage_sentence(exc.format_message(), where)}", err=True)
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            exc.show()
            sys.exit(exc.exit_code)
        except click.Abort:
            click.echo("gradprobe: interrupted; your arrays are unchanged", err=True)
            sys.exit(EXIT_INTERRUPTED)
        sys.exit(code if isinstance(code, int) else 0)


@click.group(cls=Command, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(None, "--version", package_name="gradprobe", prog_name="gradprobe",
                      message="%(prog)s %(version)s")
def cli() -> None:
    """gradprobe: verify hand-written backward passes against central differences."""


@cli.result_callback()
@click.pass_context
def _finish(ctx: click.Context, code: int, **_: Any) -> None:
    """The one exit point: every command returns its exit code."""
    ctx.exit(code)


@cli.command("check", cls=CheckCommand, help=CHECK_HELP)
@click.argument("targets", nargs=-1, metavar="[TARGET]...")
@setting_options
@click.option("--map", "show_maps", is_flag=True,
              help="Draw a map of per-element relative error for each failing tensor.")
@click.option("--quiet", "-q", is_flag=True, help="Print only the verdict line.")
@click.option("--traceback", "show_traceback", is_flag=True,
              help="Show the full traceback when the check cannot run.")
@click.option("--settings-in-force", is_flag=True,
              help="Print every setting's value and where it came from (command line, "
                   "pyproject.toml or default), then stop; with --help, list them under it.")
@click.pass_context
def check_command(ctx: click.Context, targets: tuple[str, ...], show_maps: bool, quiet: bool,
                  show_traceback: bool, settings_in_force: bool, **given: Any) -> int:
    try:
        config = load_config(Path.cwd())
        values, origins = effective_settings(ctx, given, config)
        chosen = list(targets) or config.targets(Path.cwd())
        target_origin = "command line" if targets else str(config.path) if chosen else "none"
        if settings_in_force:
            click.echo("\n".join(settings_lines(values, origins, chosen, target_origin)))
            return EXIT_OK
        if not chosen:
            raise UsageProblem("no TARGET given and no targets in [tool.gradprobe] of a "
                               "pyproject.toml here or above (see gradprobe check --help)")
        options, files = split_values(values)
        if files.json is not None:
            writable(files.json, "JSON report")
        if files.junit is not None:
            writable(files.junit, "JUnit report")
        if files.html is not None:
            writable(files.html, "HTML report")
        baseline = None
        if options.baseline is not None:  # read and checked before any work
            from .report.baseline_file import baseline_of

            baseline = baseline_of(options)
    except ProbeError as exc:
        say_error(exc.sentence(), exc, show_traceback)
        return exc.exit_code
    from .settings.report_files import reproduce

    command = reproduce(chosen, values, {s.name: s.default for s in SETTINGS})
    return _run(chosen, options, Output(files, quiet, show_traceback, show_maps, command), baseline)


def _run(chosen: list[str], options: CheckOptions, out: Output, baseline: Baseline | None = None) -> int:
    try:
        others = baseline.others(chosen) if baseline is not None else []
        runs = [check_one(spec, options, out, baseline, len(chosen) == 1, others if k == 0 else [])
                for k, spec in enumerate(chosen)]
    except KeyboardInterrupt:
        click.echo("gradprobe: interrupted; your arrays are unchanged", err=True)
        return EXIT_INTERRUPTED
    code = max(run.exit_code for run in runs)
    try:
        _reports(runs, out, options)
    except ProbeError as exc:
        say_error(exc.sentence(), exc, out.traceback)
        code = max(code, exc.exit_code)
    if len(runs) > 1:
        from .render.terminal import COLOUR, PLAIN, run_summary

        console = console_for(stderr=not out.stdout_free())
        show(console, [run_summary(runs, code, PLAIN if console.no_color else COLOUR)])
    return code


def _reports(runs: list[TargetRun], out: Output, options: CheckOptions) -> None:
    if out.files.json is not None:
        from .render.json import render_runs

        text = render_runs(runs, options.threshold, options.seed, options.method)
        if out.files.json == "-":
            click.echo(text, nl=False)
        else:
            write_report(out.files.json, text, "JSON report")
    if out.files.junit is None and out.files.html is None:
        return
    from datetime import datetime

    stamp = datetime.now().replace(microsecond=0).isoformat()
    if out.files.junit is not None:
        import socket

        from .render.junit import render_junit

        write_report(out.files.junit, render_junit(runs, stamp, socket.gethostname()), "JUnit report")
    if out.files.html is not None:
        from .render.html import render_html

        write_report(out.files.html, render_html(runs, out.command, stamp), "HTML report")


@cli.command("starter")
@click.argument("path", type=click.Path(dir_okay=False))
@click.option("--force", is_flag=True, help="Overwrite PATH if it exists.")
@click.option("--stack", is_flag=True,
              help="Write a stack of layers, each with its own backward, instead of one "
                   "forward and backward.")
def starter_command(path: str, force: bool, stack: bool) -> int:
    """Write a commented starter target to PATH that runs as it is.

    Replace its small layer (or, with --stack, its layers) with your own forward and
    backward, then run gradprobe check PATH.
    """
    from .targets.starter import write_starter

    try:
        write_starter(Path(path), force, stack)
    except ProbeError as exc:
        say_error(exc.sentence(), exc, False)
        return exc.exit_code
    click.echo(f"wrote {path}; run: gradprobe check {path}")
    return EXIT_OK


def main(argv: list[str] | None = None) -> Any:
    return cli.main(args=argv, prog_name="gradprobe")


if __name__ == "__main__":  # pragma: no cover
    main()
