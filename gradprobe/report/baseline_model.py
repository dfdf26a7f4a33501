"""The baseline's side of a comparison (protocol section 8), part of the report model: what
an earlier report said about each tensor (read by :mod:`gradprobe.report.baseline_file`) and how a
tensor changed since (set by :func:`gradprobe.report.comparison.compare`, shown by renderers)."""

from __future__ import annotations

from enum import Enum

from ..common.classes import dataclass
from ..common.status import Status
from .checked import CheckedCoordinates


class Change(str, Enum):
    """How a tensor changed since the baseline."""

    REGRESSED = "regressed"  # both pass, its worst relative error grew more than the factor
    WORSE = "worse"  # its status got worse
    NEW = "new"  # not in the baseline
    GONE = "gone"  # in the baseline only
    SAME = "same"
    BETTER = "better"

    def __str__(self) -> str:
        return self.value

    @property
    def fails(self) -> bool:
        return self in (Change.REGRESSED, Change.WORSE)


@dataclass(frozen=True)
class BaselineTensor:
    """One tensor as an earlier report gave it."""

    name: str
    shape: tuple[int, ...]
    status: Status
    max_rel_error: float | None
    worst_noise: float | None
    checked: int
    coordinates: CheckedCoordinates | None = None  # listed when the tensor was sampled
    directions: tuple[tuple[float, float], ...] = ()  # (relative error, relative noise) each


@dataclass(frozen=True)
class BaselineReport:
    """One target's earlier report: what the comparison needs of it."""

    path: str
    target: str
    threshold: float
    seed: int
    method: str
    compute_dtype: str
    numbers_dtype: str  # the type its relative errors were measured in (float64 for narrow
    # code checked on its float64 run)
    tensors: tuple[BaselineTensor, ...]
    # (sample, directions) as that run asked for them (None each: decided from the target);
    # None: the file does not say (written before reports recorded it)
    sampling: tuple[int | None, int | None] | None = None

    def tensor(self, name: str) -> BaselineTensor | None:
        return next((t for t in self.tensors if t.name == name), None)


@dataclass(frozen=True)
class TensorBaseline:
    """What the baseline said about one tensor, and how this run compares."""

    change: Change
    status: Status | None = None  # the baseline's status (None: a new tensor)
    max_rel_error: float | None = None  # the baseline's worst relative error
    growth: float | None = None  # this run's worst error over the baseline's, above the floor
    floor: float | None = None  # errors below this are not compared (noise and rounding)
    compared_on: int | None = None  # coordinates both runs checked (None: worst against worst)
    numeric_shift: float | None = None  # how far the numeric derivatives moved (relative)
    reason: str | None = None  # one sentence, for a regressed or worse tensor


@dataclass(frozen=True)
class RunBaseline:
    """The comparison of a whole report: where the baseline came from and what is gone."""

    path: str
    target: str | None  # the baseline's target (None: it holds no report for this one)
    growth_factor: float
    gone: tuple[BaselineTensor, ...] = ()
