"""gradprobe: check hand-written backward passes against central differences.

The names below are imported on first use (PEP 562), so ``gradprobe --help`` and the pytest
plugin's registration do not pay for numpy and the engine until a check runs.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .targets.adapters import layer_target
    from .api import (
        probe,
        probe_stack,
        probe_target,
        raise_if_failed,
        render_text,
        report_dict,
    )
    from .common.errors import (
        BadOutputError,
        ComplexStepError,
        InPlaceWriteError,
        NondeterminismError,
        ProbeError,
        ProcessExitError,
        TargetLoadError,
        UsageProblem,
        UserCodeError,
    )
    from .fixture import GradProbe
    from .settings.options import CheckOptions
    from .report.model import LayerResult, Report, TensorResult
    from .common.status import Status
    from .targets.target import Target

_HOMES = {
    "layer_target": "targets.adapters",
    **dict.fromkeys(("probe", "probe_stack", "probe_target", "raise_if_failed", "render_text",
                     "report_dict"), "api"),
    **dict.fromkeys(("BadOutputError", "ComplexStepError", "InPlaceWriteError",
                     "NondeterminismError", "ProbeError", "ProcessExitError", "TargetLoadError",
                     "UsageProblem", "UserCodeError"), "common.errors"),
    "GradProbe": "fixture",
    "CheckOptions": "settings.options",
    **dict.fromkeys(("LayerResult", "Report", "TensorResult"), "report.model"),
    "Status": "common.status",
    "Target": "targets.target",
}

__version__: str  # read from the installed metadata on first use


def __getattr__(name: str) -> Any:
    if name == "__version__":
        from importlib.metadata import PackageNotFoundError, version

        try:
            return version("gradprobe")
        except PackageNotFoundError:  # a source checkout that was never installed
            return "0+unknown"
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'gradprobe' has no attribute {name!r}")
    value = getattr(import_module(f".{home}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*globals(), *_HOMES, "__version__"])


__all__ = [
    "BadOutputError",
    "CheckOptions",
    "ComplexStepError",
    "GradProbe",
    "InPlaceWriteError",
    "LayerResult",
    "NondeterminismError",
    "ProbeError",
    "ProcessExitError",
    "Report",
    "Status",
    "Target",
    "TargetLoadError",
    "TensorResult",
    "UsageProblem",
    "UserCodeError",
    "__version__",
    "layer_target",
    "probe",
    "probe_stack",
    "probe_target",
    "raise_if_failed",
    "render_text",
    "report_dict",
]
