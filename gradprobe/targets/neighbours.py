"""The modules a file target imports from its own folder (its neighbours), kept apart per
folder: two targets in one run, each beside its own helper.py, each import their own."""

from __future__ import annotations

import os
import sys

_NEIGHBOURS: dict[str, str] = {}  # a module a file target imported from its folder -> that folder


def own_neighbours(folder: str) -> set[str]:
    """Forget the modules an earlier file target imported from another folder under a name
    that ``folder`` has a module of its own for, so the file about to load from ``folder``
    imports its own; returns the names in sys.modules then."""
    for mod, there in list(_NEIGHBOURS.items()):
        if there != folder and (os.path.isfile(os.path.join(folder, mod + ".py"))
                                or os.path.isdir(os.path.join(folder, mod))):
            for key in [k for k in sys.modules if k == mod or k.startswith(mod + ".")]:
                del sys.modules[key]
            del _NEIGHBOURS[mod]
    return set(sys.modules)


def note_neighbours(before: set[str], folder: str) -> None:
    """Remember the top-level modules loaded since ``before`` from ``folder`` itself."""
    for name in set(sys.modules) - before:
        where = os.path.dirname(getattr(sys.modules.get(name), "__file__", None) or "")
        if "." not in name and where in (folder, os.path.join(folder, name)):
            _NEIGHBOURS[name] = folder
