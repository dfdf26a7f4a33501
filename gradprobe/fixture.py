"""The value of the ``grad_probe`` pytest fixture, importable without pytest for annotations."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from types import TracebackType
from typing import Any

from .report.model import Report

PACKAGE = str(Path(__file__).resolve().parent)


class GradProbe:
    """The ``grad_probe`` fixture's value: call it like :func:`gradprobe.probe`, or its
    ``stack`` like :func:`gradprobe.probe_stack`.

    Returns the report when the check is ok; otherwise fails the test with a first line
    naming the failing tensors and the worst error, then the per-layer table. The target is
    named after the test; gradprobe's own frames are hidden from tracebacks.
    """

    def __init__(self, defaults: Mapping[str, Any], label: str | None = None, width: int = 120) -> None:
        self.defaults = dict(defaults)
        self.label = label  # the target's name in reports: the test's (None: forward's)
        self.width = width

    def __call__(
        self,
        forward: Callable[..., Any],
        backward: Callable[..., Any],
        params: Mapping[str, Any],
        inputs: Mapping[str, Any] | None = None,
        **options: Any,
    ) -> Report:
        __tracebackhide__ = True
        from .api import probe

        return self._checked(lambda **o: probe(forward, backward, params, inputs, **o), options)

    def stack(
        self,
        layers: Any,
        params: Mapping[str, Any] | None = None,
        inputs: Mapping[str, Any] | None = None,
        **options: Any,
    ) -> Report:
        """Check a stack like :func:`gradprobe.probe_stack`; fails the test naming the layers
        where the error enters."""
        __tracebackhide__ = True
        from .api import probe_stack

        return self._checked(lambda **o: probe_stack(layers, params, inputs, **o), options)

    def _checked(self, run: Callable[..., Report], options: Mapping[str, Any]) -> Report:
        __tracebackhide__ = True
        import pytest

        from .common.errors import ProbeError, UserCodeError
        from .render.lines import failure_line
        from .render.terminal import render_text

        chosen = {**({"label": self.label} if self.label else {}), **self.defaults, **options}
        try:
            report = run(**chosen)
        except ProbeError as exc:
            if exc.fix == UserCodeError.fix:  # the command line's advice: pytest shows the frames
                exc.fix = "the traceback above shows where in your code; fix it there"
            if exc.__cause__ is not None:
                exc.__cause__.__traceback__ = _outside(exc.__cause__.__traceback__)
            raise exc.with_traceback(None) from exc.__cause__  # starts here: hidden
        if not report.ok:
            pytest.fail(failure_line(report) + "\n" + render_text(report, width=self.width), pytrace=False)
        return report


def _outside(tb: TracebackType | None) -> TracebackType | None:
    """``tb`` without its leading frames inside gradprobe (the user's frames stay)."""
    while tb is not None and tb.tb_frame.f_code.co_filename.startswith(PACKAGE):
        tb = tb.tb_next
    return tb
