"""gradprobe: check hand-written backward passes against central differences.

The names below are imported on first use (PEP 562), so ``gradprobe --help`` and the pytest
plugin's registration do not pay for numpy and the engine until a check runs.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .adapters import layer_target
    from .api import (
        probe,
        probe_stack,
        probe_target,
        raise_if_failed,
        render_text,
        report_dict,
    )
    from .errors import (
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
    from .options import CheckOptions
    from .report import LayerResult, Report, TensorResult
    from .status import Status
    from .target import Target

_HOMES = {
    "layer_target": "adapters",
    **dict.fromkeys(("probe", "probe_stack", "probe_target", "raise_if_failed", "render_text",
                     "report_dict"), "api"),
    **dict.fromkeys(("BadOutputError", "ComplexStepError", "InPlaceWriteError",
                     "NondeterminismError", "ProbeError", "ProcessExitError", "TargetLoadError",
                     "UsageProblem", "UserCodeError"), "errors"),
    "GradProbe": "fixture",
    "CheckOptions": "options",
    **dict.fromkeys(("LayerResult", "Report", "TensorResult"), "report"),
    "Status": "status",
    "Target": "target",
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
