"""pytest plugin: the ``grad_probe`` fixture, registered through the ``pytest11`` entry point.

    def test_dense_layer(grad_probe):
        grad_probe(forward, backward, params, inputs)

The fixture checks like :func:`gradprobe.probe` (``grad_probe.stack(layers, params, inputs)``
like :func:`gradprobe.probe_stack`) and returns the report when the check is ok; otherwise the
test fails with a first line naming the failing tensors and the worst error, then the per-layer
report; the target is named after the test and gradprobe's own frames are hidden. The fixture's settings
(threshold, seed, method, inconclusive, baseline, baseline_growth) come, from weakest to strongest, from gradprobe's
defaults, the ini file (``gradprobe_threshold``, ...), the command line
(``--gradprobe-threshold``, ...), a ``@pytest.mark.gradprobe(threshold=..., seed=...)`` marker,
and the call's own keywords. Annotate the fixture with :class:`gradprobe.GradProbe`.
"""

from __future__ import annotations

from typing import Any

import pytest

from .fixture import GradProbe
from .settings.options import SETTINGS, Setting

FIXTURE_SETTINGS: tuple[Setting, ...] = tuple(s for s in SETTINGS if s.fixture)


def _kind(s: Setting) -> type:
    return s.types[0]


def _option(s: Setting) -> str:
    return f"--gradprobe-{s.name.replace('_', '-')}"


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("gradprobe", "gradient checks with gradprobe")
    for s in FIXTURE_SETTINGS:
        text = f"{s.what} for the grad_probe fixture"
        group.addoption(_option(s), type=_kind(s), default=None,
                        metavar=s.metavar or s.name.upper(), choices=s.choices, help=text)
        parser.addini(f"gradprobe_{s.name}", text, default=None)


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers", "gradprobe(threshold=None, seed=None, **options): options for grad_probe"
    )


def session_settings(config: pytest.Config) -> dict[str, Any]:
    """The fixture's settings from the ini file, overridden by the command line."""
    out: dict[str, Any] = {}
    for s in FIXTURE_SETTINGS:
        ini = config.getini(f"gradprobe_{s.name}")
        if ini not in (None, ""):
            try:
                out[s.name] = _kind(s)(ini)
            except ValueError:
                raise pytest.UsageError(
                    f"gradprobe_{s.name} = {ini!r} in the ini file is not a {_kind(s).__name__}"
                ) from None
        cli = config.getoption(_option(s))
        if cli is not None:
            out[s.name] = cli
    return out


def pytest_report_header(config: pytest.Config) -> str:
    settings = session_settings(config)
    threshold = settings.get("threshold", "by floating type")
    line = f"gradprobe: threshold {threshold}, seed {settings.get('seed', 0)}"
    if settings.get("inconclusive", "allow") != "allow":
        line += f", inconclusive {settings['inconclusive']}"
    if settings.get("baseline"):
        line += f", baseline {settings['baseline']} (growth x{settings.get('baseline_growth', 10.0):g})"
    return line


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
