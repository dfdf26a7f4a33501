"""The options of one check, shared by the CLI, the config file and the Python API."""

from __future__ import annotations

from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np

from .errors import UsageProblem

METHODS = ("central", "richardson", "complex")

# Default relative-error thresholds by the floating type the forward computes in. float64:
# central differences reach about eps**(2/3) ~ 4e-11 on well-scaled functions, so 1e-6 leaves
# room for conditioning (common practice). float32: eps**(2/3) ~ 2.4e-5 and sums of many
# float32 terms lose more, so 1e-2 (common practice for single precision).
DEFAULT_THRESHOLDS = {np.dtype(np.float64): 1e-6, np.dtype(np.float32): 1e-2, np.dtype(np.float16): 1e-1}


def default_threshold(dtype: np.dtype) -> float:
    return DEFAULT_THRESHOLDS.get(np.dtype(dtype), 1e-6)


@dataclass(frozen=True)
class CheckOptions:
    """How to check. ``None`` means "decide from the target" (threshold, directions)."""

    threshold: float | None = None
    seed: int = 0
    method: str = "central"
    recheck: bool = True  # re-check failing coordinates by extrapolation before failing them
    sample: int | None = None  # coordinates per tensor; None: full sweep up to sweep_limit
    directions: int | None = None  # random directions per tensor; None: only above sweep_limit
    sweep_total: int = 20_000  # a target with at most this many coordinates is swept in full
    sweep_limit: int = 48  # in a larger target, tensors up to this size still are
    default_sample: int = 24  # coordinates checked in a tensor that is not swept
    default_directions: int = 2
    jobs: int = 1

    def __post_init__(self) -> None:
        if self.threshold is not None and not (self.threshold > 0 and np.isfinite(self.threshold)):
            raise UsageProblem(f"the threshold must be a positive number, not {self.threshold}")
        if self.method not in METHODS:
            raise UsageProblem(f"unknown method {self.method!r}; choose one of {', '.join(METHODS)}")
        for name in ("sample", "directions"):
            value = getattr(self, name)
            if value is not None and value < 0:
                raise UsageProblem(f"{name} must be 0 or more, not {value}")
        if self.sample == 0 and self.directions == 0:
            raise UsageProblem("sample 0 with directions 0 would check nothing")
        if self.jobs < 1:
            raise UsageProblem(f"jobs must be 1 or more, not {self.jobs}")

    def with_values(self, **values: Any) -> "CheckOptions":
        """A copy with the given fields replaced; unknown names are a UsageProblem."""
        known = {f.name for f in fields(self)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise UsageProblem(f"unknown option {unknown[0]!r}; known: {', '.join(sorted(known))}")
        return replace(self, **values)
