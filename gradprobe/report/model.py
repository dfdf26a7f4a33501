"""The report model: what a check found, consumed by every renderer.

Frozen dataclasses; derived numbers are properties. The engine builds a :class:`Report`;
renderers (terminal, JSON, JUnit, pytest messages) only read it.
"""

from __future__ import annotations

import math
from dataclasses import field
from typing import TYPE_CHECKING, Any

from ..common.classes import dataclass
from .checked import CheckedCoordinates
from ..common.status import Status

if TYPE_CHECKING:  # the baseline's side is loaded with --baseline only
    from .baseline_model import RunBaseline, TensorBaseline
    from .second import SecondOrderResult


@dataclass(frozen=True)
class DirectionResult:
    """One random-direction check of a tensor: analytic gradient . v against the numeric slope."""

    analytic: float
    numeric: float
    error_estimate: float
    rel_error: float
    ok: bool
    evaluations: int
    kink: bool = False  # a kink along the direction explains the discrepancy


@dataclass(frozen=True)
class CoordinateDetail:
    """One failing or inconclusive coordinate, with the numeric value's error estimate."""

    index: tuple[int, ...]
    analytic: float
    numeric: float
    error_estimate: float
    rel_error: float
    status: Status
    reason: str | None = None  # why an inconclusive coordinate could not be decided

    def __post_init__(self) -> None:
        object.__setattr__(self, "status", Status(self.status))


@dataclass(frozen=True)
class TensorResult:
    """The verdict on one tensor's gradient."""

    name: str
    layer: str
    kind: str  # "param", "input", or "unknown" (a gradient for a name that is neither)
    shape: tuple[int, ...]
    dtype: str
    checked: int
    failed: int
    kinks: int
    status: Status
    max_abs_error: float | None = None
    max_rel_error: float | None = None
    worst_index: tuple[int, ...] | None = None
    bad_indices: tuple[tuple[int, ...], ...] = ()
    kink_indices: tuple[tuple[int, ...], ...] = ()
    inconclusive: int = 0
    max_error_estimate: float | None = None  # largest numeric error estimate among checked
    worst_noise: float | None = None  # the worst coordinate's error estimate, relative
    details: tuple[CoordinateDetail, ...] = ()  # failing and inconclusive coordinates
    hint: str | None = None
    inconclusive_reason: str | None = None  # why the tensor is inconclusive, in one sentence
    evaluations: int = 0
    directions: tuple[DirectionResult, ...] = ()
    located_evaluations: int | None = None  # spent finding wrong coordinates from directions
    error_map: Any = field(default=None, compare=False, repr=False)  # rel error per element
    inherited_from: str | None = None  # stacks: fails only because this later layer is wrong
    coordinates: CheckedCoordinates | None = field(default=None, compare=False, repr=False)
    baseline: TensorBaseline | None = None  # how it compares with an earlier run (--baseline)
    device: str | None = None  # where the tensor lives, when not on the CPU

    def __post_init__(self) -> None:
        object.__setattr__(self, "status", Status(self.status))  # plain strings accepted

    @property
    def size(self) -> int:
        return math.prod(self.shape)

    @property
    def ok(self) -> bool:
        """No disagreement (an inconclusive tensor is ok unless the run says otherwise)."""
        return self.status is not Status.FAIL

    @property
    def worst_detail(self) -> CoordinateDetail | None:
        """The failing coordinate with the largest relative error (its analytic and numeric
        values answer "what did it expect?"), or None when no coordinate failed."""
        failing = [d for d in self.details if d.status is Status.FAIL]
        return max(failing, key=lambda d: d.rel_error) if failing else None


@dataclass(frozen=True)
class LayerResult:
    name: str
    tensors: tuple[TensorResult, ...]
    # Stacks only: the verdict of this layer's backward checked on its own, that check's
    # tensors (its params and, named ``own_input``, its input), and what the check cost.
    own: Status | None = None
    own_tensors: tuple[TensorResult, ...] = ()
    own_input: str | None = None
    own_evaluations: int = 0

    def __post_init__(self) -> None:
        if self.own is not None:
            object.__setattr__(self, "own", Status(self.own))  # plain strings accepted

    @property
    def ok(self) -> bool:
        """No tensor of the layer disagrees, and (stacks) its own backward is not wrong."""
        return all(t.ok for t in self.tensors) and self.own is not Status.FAIL

    @property
    def input_gradient_wrong(self) -> bool:
        """Its own backward returns a wrong gradient for its input (stacks)."""
        return any(t.status is Status.FAIL for t in self.own_tensors if t.name == self.own_input)

    @property
    def wrong_param_gradients(self) -> tuple[TensorResult, ...]:
        """Its own params whose gradient its own backward gets wrong (stacks)."""
        return tuple(t for t in self.own_tensors if t.status is Status.FAIL and t.name != self.own_input)

    @property
    def max_rel_error(self) -> float | None:
        values = [t.max_rel_error for t in self.tensors if t.max_rel_error is not None]
        return max(values) if values else None


@dataclass(frozen=True)
class Report:
    """Everything one check of one target found."""

    target: str
    threshold: float
    seed: int
    layers: tuple[LayerResult, ...]
    evaluations: int
    seconds: float
    method: str = "central"
    compute_dtype: str = "float64"
    errors: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    # Stacks only: the layers whose own backward is wrong, input side first (None: not a
    # stack), and how many of ``evaluations`` the layers' own checks took.
    error_enters_at: tuple[str, ...] | None = None
    own_evaluations: int = 0
    array_library: str = "numpy"  # the library of the target's arrays (protocol section 6)
    gradient_source: str = "backward"  # or "autograd": the framework's reverse mode

    @property
    def is_stack(self) -> bool:
        return self.error_enters_at is not None

    @property
    def inherited(self) -> tuple[TensorResult, ...]:
        """Tensors failing end to end only because a later layer is wrong."""
        return tuple(t for t in self.tensors if t.inherited_from is not None)
    inconclusive_fails: bool = False  # the run was asked to fail on inconclusive tensors
    # Narrow code checked on its float64 run: the threshold its narrow gradient is held to
    # against that run (``threshold`` is the float64 run's); None otherwise.
    narrow_threshold: float | None = None
    baseline: RunBaseline | None = None  # the earlier run compared with (--baseline)
    second_order: SecondOrderResult | None = None  # protocol section 7; None: not given/checked
    # --sample and --directions as asked (None: decided from the target), for later comparisons
    sample: int | None = None
    directions: int | None = None

    @property
    def tensors(self) -> tuple[TensorResult, ...]:
        return tuple(t for layer in self.layers for t in layer.tensors)

    @property
    def ok(self) -> bool:
        """Nothing disagrees, nothing is inconclusive when that was asked to fail, nothing
        regressed or got worse since the baseline, (stacks) no layer's own backward is
        wrong, and the second derivatives, when checked, do not fail."""
        return (not self.blocking_tensors and not self.changed_for_worse
                and all(layer.own is not Status.FAIL for layer in self.layers)
                and (self.second_order is None or self.second_order.ok))

    @property
    def changed_for_worse(self) -> tuple[TensorResult, ...]:
        """Tensors regressed or worse since the baseline (none without one)."""
        return tuple(t for t in self.tensors if t.baseline is not None and t.baseline.change.fails)

    def count(self, status: Status) -> int:
        """How many tensors have ``status``."""
        return sum(1 for t in self.tensors if t.status == status)

    @property
    def checked(self) -> int:
        return sum(t.checked for t in self.tensors)

    @property
    def failed(self) -> int:
        return sum(t.failed for t in self.tensors)

    @property
    def kinks(self) -> int:
        return sum(t.kinks for t in self.tensors)

    @property
    def failing_tensors(self) -> tuple[TensorResult, ...]:
        return tuple(t for t in self.tensors if t.status is Status.FAIL)

    @property
    def blocking_tensors(self) -> tuple[TensorResult, ...]:
        """The tensors that make the run fail: failing ones, and inconclusive ones when
        the run was asked to fail on those."""
        blocking = {Status.FAIL, Status.INCONCLUSIVE} if self.inconclusive_fails else {Status.FAIL}
        return tuple(t for t in self.tensors if t.status in blocking)

    def tensor(self, name: str) -> TensorResult:
        """The result for tensor ``name`` (KeyError naming the known ones otherwise)."""
        for t in self.tensors:
            if t.name == name:
                return t
        raise KeyError(f"no tensor {name!r}; the report has {[t.name for t in self.tensors]}")


@dataclass(frozen=True)
class TargetRun:
    """The outcome of one target of a run: its report, or why it could not run."""

    target: str
    exit_code: int
    report: Report | None = None
    error: str | None = None  # the one sentence, when the check could not run
