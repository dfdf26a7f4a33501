"""Warnings a forward raises: the user's at the base point, evidence at points gradprobe moved to.

A moved point is gradprobe's choice, not the user's: what forward warns there is caught and
never shown. A RuntimeWarning there that the base point does not raise (numpy's divide by
zero, overflow, invalid value) says the point lies outside forward's domain, and the caller
shrinks the step. Warnings at the base point are shown as Python shows them, once per check.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

Key = tuple[type, str]


def _key(w: warnings.WarningMessage) -> Key:
    return (w.category, str(w.message))


@contextmanager
def quiet() -> Iterator[None]:
    """The user's code called at a point gradprobe moved to (a backward call, a moved copy of
    the target): whatever it warns is not shown."""
    with warnings.catch_warnings(record=True):
        yield


class Watch:
    """What one forward warns, at its base point and at moved points. ``show`` false: the
    base point is itself one gradprobe moved to (a second look), and nothing is shown."""

    def __init__(self, show: bool = True) -> None:
        self.base: set[Key] | None = None  # learnt from the base point's calls
        self._show = show
        self._shown: dict[Any, Any] = {}  # the registry that shows base warnings once

    def call(self, forward: Callable[..., Any], params: Any, inputs: Any, moved: bool) -> tuple[Any, set[Key]]:
        """forward's result and, at a moved point, the RuntimeWarnings it raised."""
        with warnings.catch_warnings(record=True) as seen:
            out = forward(params, inputs)
        if moved:
            return out, {_key(w) for w in seen if issubclass(w.category, RuntimeWarning)}
        self.base = (self.base or set()) | {_key(w) for w in seen}
        for w in seen if self._show else ():
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno, registry=self._shown)
        return out, set()

    def outside(self, warned: set[Key]) -> bool:
        """A moved point's warnings that the base point does not raise (base known)."""
        return bool(warned - (self.base or set()))
