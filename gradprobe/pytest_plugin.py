"""pytest plugin: the ``grad_probe`` fixture, registered through the ``pytest11`` entry point.

    def test_dense_layer(grad_probe):
        grad_probe(forward, backward, params, inputs)

The fixture checks like :func:`gradprobe.probe` and returns the report when the check passes;
otherwise the test fails with the per-layer report as its message. The threshold and seed come,
from weakest to strongest, from gradprobe's defaults, the ini file (``gradprobe_threshold``,
``gradprobe_seed``), the command line (``--gradprobe-threshold``, ``--gradprobe-seed``), a
``@pytest.mark.gradprobe(threshold=..., seed=...)`` marker, and the call's own keywords.
"""

from __future__ import annotations

from typing import Any

import pytest

from .fixture import GradProbe

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


@pytest.fixture
def grad_probe(request: pytest.FixtureRequest) -> GradProbe:
    """Check a hand-written backward pass; fails the test with the per-layer report."""
    defaults = session_settings(request.config)
    marker = request.node.get_closest_marker("gradprobe")
    if marker is not None:
        defaults.update(marker.kwargs)
    return GradProbe(defaults)
