"""gradprobe: check hand-written backward passes against central differences."""

from .api import probe, probe_stack, probe_target
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
from .options import CheckOptions
from .report import LayerResult, Report, TensorResult

__version__ = "0.1.0"

__all__ = [
    "BadOutputError",
    "CheckOptions",
    "ComplexStepError",
    "InPlaceWriteError",
    "LayerResult",
    "NondeterminismError",
    "ProbeError",
    "Report",
    "TargetLoadError",
    "TensorResult",
    "UsageProblem",
    "UserCodeError",
    "__version__",
    "probe",
    "probe_stack",
    "probe_target",
]
