"""The value of the ``grad_probe`` pytest fixture, importable without pytest for annotations."""

from __future__ import annotations

from typing import Any, Callable, Mapping

from .report import Report


class GradProbe:
    """The ``grad_probe`` fixture's value: call it like :func:`gradprobe.probe`.

    Returns the report when the check is ok; otherwise fails the test with the per-layer
    table as its message.
    """

    def __init__(self, defaults: Mapping[str, Any]) -> None:
        self.defaults = dict(defaults)

    def __call__(
        self,
        forward: Callable[..., Any],
        backward: Callable[..., Any],
        params: Mapping[str, Any],
        inputs: Mapping[str, Any] | None = None,
        **options: Any,
    ) -> Report:
        __tracebackhide__ = True
        import pytest

        from .api import probe
        from .render.terminal import render_text

        report = probe(forward, backward, params, inputs, **{**self.defaults, **options})
        if not report.ok:
            pytest.fail("gradient check failed\n" + render_text(report, width=160), pytrace=False)
        return report
