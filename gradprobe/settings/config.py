"""Project defaults from the ``[tool.gradprobe]`` table of the nearest pyproject.toml.

    [tool.gradprobe]
    threshold = 1e-5
    seed = 3
    inconclusive = "fail"
    targets = ["nets/mlp.py", "nets.conv:case"]

Command-line options override these; every key is checked, and a misspelt one is a clear
error rather than a silently ignored setting.
"""

from __future__ import annotations

import os
import sys
from dataclasses import field
from pathlib import Path
from typing import Any

from ..common.classes import dataclass
from ..common.errors import UsageProblem
from .options import SETTING, SETTINGS

# key -> (accepted types, description): every setting, plus the targets to check.
KEYS: dict[str, tuple[tuple[type, ...], str]] = {
    **{s.config_key: (s.types, s.what) for s in SETTINGS},
    "targets": ((list,), "targets to check when none is named"),
}


@dataclass(frozen=True)
class ProjectConfig:
    path: Path | None  # the pyproject.toml read, or None
    values: dict[str, Any] = field(default_factory=dict)

    def targets(self, cwd: Path) -> list[str]:
        """Configured targets; file paths are taken relative to the pyproject's folder."""
        out = []
        for spec in self.values.get("targets", []):
            location, sep, name = spec.partition(":") if spec.count(":") == 1 else (spec, "", "")
            if self.path is not None and (location.endswith(".py") or "/" in location):
                location = os.path.relpath(self.path.parent / location, cwd)
            out.append(location + sep + name)
        return out


def find_pyproject(start: Path) -> Path | None:
    """The nearest pyproject.toml in ``start`` or a folder above it."""
    for folder in (start, *start.parents):
        candidate = folder / "pyproject.toml"
        if candidate.is_file():
            return candidate
    return None


def _check(key: str, value: Any, path: Path) -> Any:
    if key not in KEYS:
        import difflib

        close = difflib.get_close_matches(key, list(KEYS), n=1)
        tip = f"; did you mean {close[0]!r}?" if close else f"; known keys: {', '.join(KEYS)}"
        raise UsageProblem(f"{path}: unknown key {key!r} in [tool.gradprobe]{tip}", value=key)
    types, what = KEYS[key]
    fits = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
    if not fits:
        raise UsageProblem(
            f"{path}: [tool.gradprobe] {key} must be {' or '.join(t.__name__ for t in types)} "
            f"({what}), not {value!r}", value=value)
    if key == "targets" and not all(isinstance(t, str) for t in value):
        raise UsageProblem(f"{path}: [tool.gradprobe] targets must be a list of strings", value=value)
    choices = SETTING[key].choices if key in SETTING else None
    if choices and value not in choices:
        raise UsageProblem(
            f"{path}: [tool.gradprobe] {key} must be one of {', '.join(choices)}, not {value!r}",
            value=value)
    return float(value) if float in types and not isinstance(value, bool) else value


def may_hold_our_table(text: str) -> bool:
    """Whether a pyproject.toml's text can declare ``[tool.gradprobe]`` at all: a line that
    names both ``tool`` and ``gradprobe`` (a header such as ``[tool.gradprobe]`` or
    ``[ "tool".'gradprobe' ]``, a dotted key ``tool.gradprobe.seed = 3``, an inline table
    ``tool = {gradprobe = {...}}``), or a ``[tool]`` header (under which a ``gradprobe`` key
    may follow). A file with neither is not parsed (the parser and its set-up cost a check
    of a fast forward about 3 ms); one that is not valid TOML is then not reported either,
    as gradprobe has nothing to read in it."""
    if "gradprobe" not in text:
        return False
    for line in text.splitlines():
        if "tool" in line and ("gradprobe" in line or "".join(
                c for c in line if c not in " \t\"'").lstrip("[").startswith("tool]")):
            return True
    return False


def load_config(start: Path) -> ProjectConfig:
    """The ``[tool.gradprobe]`` table of the nearest pyproject.toml (empty when there is none)."""
    path = find_pyproject(start)
    if path is None:
        return ProjectConfig(None)
    try:
        text = path.read_text()
    except OSError as exc:
        raise UsageProblem(f"{path} cannot be read as TOML ({exc})", value=str(path)) from exc
    if not may_hold_our_table(text):
        return ProjectConfig(path)
    if sys.version_info >= (3, 11):  # the parser is loaded only where it has something to find
        import tomllib
    else:  # pragma: no cover - exercised on Python 3.10
        import tomli as tomllib
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UsageProblem(f"{path} cannot be read as TOML ({exc})", value=str(path)) from exc
    table = data.get("tool", {}).get("gradprobe", {})
    if not isinstance(table, dict):
        raise UsageProblem(f"{path}: [tool.gradprobe] must be a table", value=table)
    return ProjectConfig(path, {k: _check(k, v, path) for k, v in table.items()})
