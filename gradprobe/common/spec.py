"""The syntax of a target's entry-point string (protocol section 1): ``LOCATION[:NAME]``,
where LOCATION is a Python file or a dotted module. Pure string handling: loading is
:mod:`.loading`'s, and renderers name targets with these without loading anything."""

from __future__ import annotations

import os


def split_spec(spec: str) -> tuple[str, str | None]:
    """``"nets/mlp.py:case"`` -> ``("nets/mlp.py", "case")``; no ``:NAME`` -> ``(spec, None)``."""
    head, sep, tail = spec.rpartition(":")
    if sep and head and tail.isidentifier():
        return head, tail
    return spec, None


def is_file_spec(location: str) -> bool:
    return location.endswith(".py") or "/" in location or os.sep in location
