"""pytest plugin: the ``grad_probe`` fixture, registered through the ``pytest11`` entry point.

    def test_dense_layer(grad_probe):
        grad_probe(forward, backward, params, inputs)

The fixture checks like :func:`gradprobe.probe` (``grad_probe.stack(layers, params, inputs)``
like :func:`gradprobe.probe_stack`) and returns the report when the check passes;
otherwise the test fails with a first line naming the failing tensors and the worst error, then
the per-layer report. The target is named after the test; gradprobe's own frames are hidden.
The threshold and seed come, from weakest to strongest, from gradprobe's defaults, the ini
file (``gradprobe_threshold``, ``gradprobe_seed``), the command line
(``--gradprobe-threshold``, ``--gradprobe-seed``), a
``@pytest.mark.gradprobe(threshold=..., seed=...)`` marker, and the call's own keywords.
"""

from __future__ import annotations

from pathlib import Path
from types import TracebackType
from typing import Any, Callable, Mapping

import pytest

from .api import probe, probe_stack
from .errors import ProbeError
from .render.lines import failure_line
from .report import Report

PACKAGE = str(Path(__file__).resolve().parent)

SETTINGS = ("threshold", "seed")


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("gradprobe", "gradient checks with gradprobe")
    group.addoption("--gradprobe-threshold", type=float, default=None, metavar="REL",
                    help="relative-error threshold for the grad_probe fixture")
    group.addoption("--gradprobe-seed", type=int, default=None, metavar="N",
                    help="seed for the grad_probe fixture's random draws")
    parser.addini("gradprobe_threshold", "relative-error threshold for grad_probe", default=None)
    parser.addini("gradprobe_seed", "seed for grad_probe's random draws", default=None)


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers", "gradprobe(threshold=None, seed=None, **options): options for grad_probe"
    )


def session_settings(config: pytest.Config) -> dict[str, Any]:
    """The threshold and seed from the ini file, overridden by the command line."""
    out: dict[str, Any] = {}
    for name, kind in (("threshold", float), ("seed", int)):
        ini = config.getini(f"gradprobe_{name}")
        if ini not in (None, ""):
            try:
                out[name] = kind(ini)
            except ValueError:
                raise pytest.UsageError(
                    f"gradprobe_{name} = {ini!r} in the ini file is not a {kind.__name__}"
                ) from None
        cli = config.getoption(f"--gradprobe-{name}")
        if cli is not None:
            out[name] = cli
    return out


def pytest_report_header(config: pytest.Config) -> str:
    settings = session_settings(config)
    threshold = settings.get("threshold", "by floating type")
    return f"gradprobe: threshold {threshold}, seed {settings.get('seed', 0)}"


class GradProbe:
    """The ``grad_probe`` fixture's value: call it like :func:`gradprobe.probe`."""

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
        options = {**({"label": self.label} if self.label else {}), **self.defaults, **options}
        try:
            report = probe(forward, backward, params, inputs, **options)
        except ProbeError as exc:
            if exc.__cause__ is not None:
                exc.__cause__.__traceback__ = _outside(exc.__cause__.__traceback__)
            raise exc.with_traceback(None) from exc.__cause__  # starts here: hidden
        return self._verdict(report)

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
        options = {**({"label": self.label} if self.label else {}), **self.defaults, **options}
        try:
            report = probe_stack(layers, params, inputs, **options)
        except ProbeError as exc:
            if exc.__cause__ is not None:
                exc.__cause__.__traceback__ = _outside(exc.__cause__.__traceback__)
            raise exc.with_traceback(None) from exc.__cause__  # starts here: hidden
        return self._verdict(report)

    def _verdict(self, report: Report) -> Report:
        __tracebackhide__ = True
        if not report.ok:
            pytest.fail(failure_line(report) + "\n" + report.render(width=self.width), pytrace=False)
        return report


def _outside(tb: TracebackType | None) -> TracebackType | None:
    """``tb`` without its leading frames inside gradprobe (the user's frames stay)."""
    while tb is not None and tb.tb_frame.f_code.co_filename.startswith(PACKAGE):
        tb = tb.tb_next
    return tb


@pytest.fixture
def grad_probe(request: pytest.FixtureRequest) -> GradProbe:
    """Check a hand-written backward pass; fails the test with the per-layer report."""
    defaults = session_settings(request.config)
    marker = request.node.get_closest_marker("gradprobe")
    if marker is not None:
        defaults.update(marker.kwargs)
    writer = getattr(request.config, "get_terminal_writer", None)
    width = writer().fullwidth if writer is not None else 120
    return GradProbe(defaults, label=request.node.name, width=max(60, min(width, 160)))
