"""gradprobe: check hand-written backward passes against central differences."""

from .adapters import layer_target
from .api import probe, probe_target, raise_if_failed, render_text, report_dict
from .errors import (
    BadOutputError,
    ComplexStepError,
    InPlaceWriteError,
    NondeterminismError,
    ProbeError,
    TargetLoadError,
    UsageProblem,
    UserCodeError,
)
from .fixture import GradProbe
from .options import CheckOptions
from .report import LayerResult, Report, TensorResult
from .status import Status
from .target import Target


__version__: str  # read from the installed metadata on first use (it costs an import)


def __getattr__(name: str) -> str:
    if name == "__version__":
        from importlib.metadata import PackageNotFoundError, version

        try:
            return version("gradprobe")
        except PackageNotFoundError:  # a source checkout that was never installed
            return "0+unknown"
    raise AttributeError(f"module 'gradprobe' has no attribute {name!r}")

__all__ = [
    "BadOutputError",
    "CheckOptions",
    "ComplexStepError",
    "GradProbe",
    "InPlaceWriteError",
    "LayerResult",
    "NondeterminismError",
    "ProbeError",
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
    "probe_target",
    "raise_if_failed",
    "render_text",
    "report_dict",
]
