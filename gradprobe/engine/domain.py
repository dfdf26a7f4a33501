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

    def moved_calls(self) -> MovedCalls:
        """A context for many calls at moved points in a row (see :class:`MovedCalls`)."""
        return MovedCalls()

    def outside(self, warned: set[Key]) -> bool:
        """A moved point's warnings that the base point does not raise (base known)."""
        return bool(warned - (self.base or set()))


class MovedCalls:
    """Calls at moved points in a row, each with the RuntimeWarnings it raised, as
    :meth:`Watch.call` gives them, without a ``catch_warnings`` of its own per call (at a
    forward of a few microseconds that was a third of gradprobe's cost per call).

    One recording context serves the calls up to the first that warns. Within it no warning
    can have been held back by Python's "already shown here" registries, since those are
    reset when a context is entered and only a warning that was recorded adds to them; a
    call that warns closes the context, and the next call opens a fresh one, so each call
    is seen as though it had a context of its own. Between a warning and the next moved
    call no context is open (the base point's own calls then show their warnings as usual).
    A warning raised between the calls (by gradprobe's own code, not forward) is shown as
    it would have been, once the context closes.
    """

    def __init__(self) -> None:
        self._context: warnings.catch_warnings | None = None
        self._seen: list[warnings.WarningMessage] = []
        self._used = 0  # the recorded warnings accounted for (raised inside forward)

    def __enter__(self) -> MovedCalls:
        return self

    def __exit__(self, *exc: object) -> None:
        self._close()

    def _close(self) -> None:
        if self._context is None:
            return
        context, self._context = self._context, None
        context.__exit__(None, None, None)
        for w in self._seen[self._used:]:
            warnings.showwarning(w.message, w.category, w.filename, w.lineno, w.file, w.line)

    def call(self, forward: Callable[..., Any], params: Any, inputs: Any) -> tuple[Any, set[Key]]:
        """forward's result at a moved point and the RuntimeWarnings it raised."""
        if self._context is not None and len(self._seen) > self._used:
            self._close()  # something between the calls warned: a fresh context for this one
        if self._context is None:
            self._context = warnings.catch_warnings(record=True)
            self._seen, self._used = self._context.__enter__(), 0
        try:
            out = forward(params, inputs)
        except BaseException:
            self._used = len(self._seen)  # forward's own, dropped as its context would
            self._close()
            raise
        if len(self._seen) == self._used:
            return out, set()
        warned = {_key(w) for w in self._seen[self._used:] if issubclass(w.category, RuntimeWarning)}
        self._used = len(self._seen)
        self._close()
        return out, warned
