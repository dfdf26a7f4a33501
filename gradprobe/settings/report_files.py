"""Report files of a run: refusing an unwritable path up front, and the command that
reproduces the run (stated in the HTML report)."""

from __future__ import annotations

import os
import shlex
from pathlib import Path
from typing import Any

from ..common.errors import UsageProblem


def check_writable(path: str, what: str) -> None:
    """Refuse, before any work, a report path that cannot be written."""
    target = Path(path)
    folder = target.parent
    reason = ("a file path is needed, not '-'" if path == "-" else
              "it is a folder" if target.is_dir() else
              f"the folder {folder} does not exist" if not folder.is_dir() else
              "permission denied" if not os.access(folder, os.W_OK) or
              (target.exists() and not os.access(target, os.W_OK)) else None)
    if reason is None:
        reason = _open_fails(target)
    if reason:
        raise UsageProblem(f"cannot write the {what} to {path} ({reason})", value=path,
                           fix="name a file in a folder you can write to")


def _open_fails(target: Path) -> str | None:
    """Why ``target`` cannot be opened for writing (permission bits say nothing to root, nor
    about special file systems), or None; a file made to find out is removed again."""
    existed = target.exists()
    try:
        with open(target, "a"):
            pass
    except OSError as exc:
        return (exc.strerror or str(exc)).lower()
    if not existed:
        target.unlink()
    return None


# setting -> option that reproduces it (seed is always stated; jobs does not change results)
REPRODUCE = {"threshold": "--fail-above", "method": "--method", "sample": "--sample",
             "directions": "--directions", "baseline": "--baseline", "baseline_growth": "--baseline-growth"}


def reproduce(targets: list[str], values: dict[str, Any], defaults: dict[str, Any]) -> str:
    """The command line that repeats a run's checks with its settings."""
    words = ["gradprobe", "check", *targets]
    for name, flag in REPRODUCE.items():
        if values[name] is not None and values[name] != defaults[name]:
            words += [flag, f"{values[name]:g}" if isinstance(values[name], float) else str(values[name])]
    words += ["--seed", str(values["seed"])]
    if not values["recheck"]:
        words.append("--no-recheck")
    if values.get("inconclusive", "allow") != "allow":
        words += ["--inconclusive", str(values["inconclusive"])]
    return shlex.join(words)
