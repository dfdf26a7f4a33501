"""Keeping the user's code from ending the process in the middle of a check.

``sys.exit`` raises :class:`SystemExit`, which ``except Exception`` does not catch; ``os._exit``
ends the process at once. Either would make an unfinished check look finished (``sys.exit(0)``
even like a pass). While :func:`guarded` is active, ``os._exit`` raises :class:`ExitAttempt`
instead, and both become a :class:`~gradprobe.common.errors.ProcessExitError` with one sentence.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any, NoReturn

from .errors import ProcessExitError

_depth = 0
_real_exit = os._exit


class ExitAttempt(BaseException):
    """Raised in place of ``os._exit(code)`` while a check runs."""

    def __init__(self, code: int) -> None:
        super().__init__(code)
        self.code = code


def _refuse_exit(code: int) -> NoReturn:
    raise ExitAttempt(code)


def how_it_ended(exc: BaseException) -> str:
    """``sys.exit(0)`` / ``sys.exit('message')`` / ``os._exit(3)`` for the sentence."""
    if isinstance(exc, ExitAttempt):
        return f"os._exit({exc.code})"
    code: Any = exc.code if isinstance(exc, SystemExit) else None
    return "sys.exit()" if code is None else f"sys.exit({code!r})"


def exit_error(exc: BaseException, who: str, where: str = "") -> ProcessExitError:
    """The one sentence for user code that tried to end the process."""
    return ProcessExitError(
        f"{who} called {how_it_ended(exc)}{where}, so the check did not finish (a target "
        "must return, not end the process)", value=how_it_ended(exc))


def _restore_in_child() -> None:
    """A process forked while a check runs (a worker) must be able to end normally."""
    global _depth
    _depth = 0
    os._exit = _real_exit


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_restore_in_child)


@contextmanager
def guarded(who: str = "the target's code") -> Iterator[None]:
    """Turn ``sys.exit``/``os._exit`` from the code run inside into ProcessExitError."""
    global _depth
    _depth += 1  # a plain counter: the GIL makes this step atomic
    os._exit = _refuse_exit  # type: ignore[assignment]
    try:
        yield
    except (SystemExit, ExitAttempt) as exc:
        raise exit_error(exc, who) from exc
    finally:
        _depth -= 1
        if _depth == 0:
            os._exit = _real_exit
