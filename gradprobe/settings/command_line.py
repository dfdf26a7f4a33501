"""The settings side of ``gradprobe check``: one click option per declared setting, the
values in force and where each came from, and ``--help --settings-in-force``."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import click
from click.core import ParameterSource

from .config import ProjectConfig, load_config
from ..common.errors import ProbeError
from .options import SETTINGS


def effective_settings(ctx: click.Context, given: dict[str, Any], config: ProjectConfig) -> tuple[dict, dict]:
    """Effective values and where each came from: command line > pyproject.toml > default."""
    values, origins = {}, {}
    for s in SETTINGS:
        if ctx.get_parameter_source(s.name) == ParameterSource.COMMANDLINE:
            values[s.name], origins[s.name] = given[s.name], "command line"
        elif s.config_key in config.values:
            values[s.name], origins[s.name] = config.values[s.config_key], str(config.path)
        else:
            values[s.name], origins[s.name] = s.default, "default"
    return values, origins


def settings_lines(values: dict, origins: dict, targets: list[str], target_origin: str) -> list[str]:
    rows = [(s.name, f"({s.unset})" if values[s.name] is None and s.unset else repr(values[s.name]),
             origins[s.name]) for s in SETTINGS]
    rows.append(("targets", repr(targets), target_origin))
    width = max(len(r[0]) for r in rows)
    # A long default's description does not widen the column for every other row: it pushes
    # only its own origin along.
    value_width = max(len(r[1]) for r in rows if len(r[1]) <= VALUE_COLUMN)
    lines = [f"{'setting'.ljust(width)}  {'value'.ljust(value_width)}  from"]
    lines += [f"{name.ljust(width)}  {value.ljust(value_width)}  {origin}" for name, value, origin in rows]
    return [line.rstrip() for line in lines]


VALUE_COLUMN = 24  # the widest value the column is sized for


class CheckCommand(click.Command):
    """``check``, whose help also lists the settings in force when --settings-in-force is given."""

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        ctx.meta["gradprobe.settings_in_force"] = "--settings-in-force" in args
        return super().parse_args(ctx, args)

    def format_help(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        super().format_help(ctx, formatter)
        if not ctx.meta.get("gradprobe.settings_in_force"):
            return
        try:
            config = load_config(Path.cwd())
        except ProbeError as exc:
            formatter.write_paragraph()
            formatter.write_text(f"Settings: {exc.sentence()}")
            return
        values = {s.name: config.values.get(s.config_key, s.default) for s in SETTINGS}
        origins = {s.name: str(config.path) if s.config_key in config.values else "default"
                   for s in SETTINGS}
        targets = config.targets(Path.cwd())
        with formatter.section("Settings in force (before any option on this command line)"):
            for line in settings_lines(values, origins, targets, str(config.path) if targets else "none"):
                formatter.write(" " * formatter.current_indent + line + "\n")


def setting_options(command: Callable[..., Any]) -> Callable[..., Any]:
    """Add one click option per setting, in declaration order."""
    for s in reversed(SETTINGS):
        help_text = s.help + (f" [default: {s.unset}]" if s.unset else "")
        if s.types == (bool,):
            decls = [f"--{s.flag}/--no-{s.flag}", s.name]
            command = click.option(*decls, default=s.default, show_default=True, help=help_text)(command)
            continue
        decls = [f"--{s.flag}", *([s.short] if s.short else []), s.name]
        kind: Any = click.Choice(s.choices) if s.choices else s.types[0]
        command = click.option(*decls, type=kind, default=s.default, metavar=s.metavar,
                               show_default=s.default is not None, help=help_text)(command)
    return command
