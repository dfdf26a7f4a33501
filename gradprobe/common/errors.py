"""Typed errors for checks that cannot run.

Every error carries the one sentence the CLI prints and the exit code it maps to; deeper
code raises these, and only :mod:`gradprobe.cli` turns them into an exit.
"""

from __future__ import annotations

from typing import Any


def summarise(exc: BaseException) -> str:
    """``ValueError: first line of its message`` for sentences about the user's exceptions."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


class ProbeError(Exception):
    """Root of gradprobe's errors: the check could not run (exit code 2)."""

    exit_code = 2
    fix: str | None = None  # what to do about it, ending the sentence; a site may say better

    def __init__(self, message: str, *, target: str | None = None, value: Any = None,
                 fix: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.target = target
        self.value = value
        if fix is not None:
            self.fix = fix

    def with_target(self, target: str) -> ProbeError:
        """Return this error naming ``target`` (set once; later calls keep the first)."""
        if self.target is None:
            self.target = target
        return self

    def sentence(self) -> str:
        """The one sentence shown to the user, naming the target when known."""
        text = self.message.rstrip(".")
        if self.fix:
            text += f"; {self.fix}"
        text = text if text.endswith(("?", "!")) else text + "."
        return f"{self.target}: {text}" if self.target else text

    def __str__(self) -> str:
        return self.sentence()


class UsageProblem(ProbeError):
    """An option or argument has a value that cannot work."""



class TargetLoadError(ProbeError):
    """The target cannot be found, imported or turned into forward/backward/params."""


class UserCodeError(ProbeError):
    """The user's forward or backward raised; the original exception is chained."""

    fix: str | None = "add --traceback to see where in your code, then fix it there"


class BadOutputError(ProbeError):
    """forward returned something that is not a finite number or array."""

    fix = "forward must return a finite scalar loss, or an array of floats of one fixed shape"


class NondeterminismError(ProbeError):
    """forward gave different results for the same arguments."""

    fix = ("draw any randomness once in setup() and pass it in inputs, or seed it inside "
           "forward")


class InPlaceWriteError(ProbeError):
    """forward or backward wrote into an array it was given."""

    fix = "compute into new arrays instead (y = x * 2, not x *= 2), or copy the array first"


class ComplexStepError(ProbeError):
    """The complex-step method was asked for, but forward does not carry complex values."""

    fix = "use --method central or --method richardson instead"


class GraphLeftError(UserCodeError):
    """A forward-only target's forward leaves its framework's graph: no gradient flows."""

    fix = ("keep forward in the framework's operations (no .numpy(), no numpy calls on its "
           "arrays), or give the target a backward")


class ProcessExitError(UserCodeError):
    """The user's code called sys.exit or os._exit during the check; it did not finish."""

    fix = None  # its sentence says what the code must do instead
