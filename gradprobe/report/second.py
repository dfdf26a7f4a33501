"""The report model of second derivatives (protocol section 7): one record per block of the
Hessian (row tensor x column tensor) and one for the whole check.

Frozen dataclasses built by :mod:`gradprobe.engine.second_order`; renderers only read them.
"""

from __future__ import annotations

import math
from dataclasses import field
from typing import Any

from ..common.classes import dataclass
from ..common.status import Status

ENTERS = ("hessian", "gradient")  # the values of error_enters_at besides None


@dataclass(frozen=True)
class BlockResult:
    """The verdict on one block of the Hessian: rows of tensor ``rows``, columns of ``cols``."""

    rows: str
    cols: str
    row_shape: tuple[int, ...]
    col_shape: tuple[int, ...]
    status: Status
    checked: int  # block elements compared one by one (rows x coordinate columns)
    failed: int = 0
    kinks: int = 0
    inconclusive: int = 0
    max_rel_error: float | None = None
    max_abs_error: float | None = None
    worst_noise: float | None = None  # the worst element's numeric error estimate, relative
    worst_index: tuple[tuple[int, ...], tuple[int, ...]] | None = None
    bad_indices: tuple[tuple[tuple[int, ...], tuple[int, ...]], ...] = ()
    directions: int = 0  # random directions along the column tensor compared for these rows
    directions_off: int = 0
    hint: str | None = None
    reason: str | None = None  # why an inconclusive block could not be decided
    error_map: Any = field(default=None, compare=False, repr=False)  # rel error, rows x cols

    def __post_init__(self) -> None:
        object.__setattr__(self, "status", Status(self.status))

    @property
    def name(self) -> str:
        return f"{self.rows} × {self.cols}"

    @property
    def size(self) -> int:
        return math.prod(self.row_shape) * math.prod(self.col_shape)


@dataclass(frozen=True)
class ForwardAgreement:
    """Check 2: ``u·H v`` against second differences of forward, per pair of tensors."""

    status: Status  # pass, fail, or inconclusive (no pair resolved finely enough)
    pairs: int  # pairs (u on one tensor, v on another or the same) compared
    failed: int
    max_rel_error: float | None  # the worst |u·Hv - F| / scale
    resolution: float | None  # how finely forward's second differences were trusted (relative)
    failing_pairs: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class SecondOrderResult:
    """What the check of a hand-written Hessian or Hessian-vector product found."""

    form: str  # "hvp", "hessian" or "autograd"
    status: Status
    error_enters_at: str | None
    symmetric: Status  # pass, fail or inconclusive
    blocks: tuple[BlockResult, ...]
    forward: ForwardAgreement | None = None
    symmetry_max_rel_error: float | None = None
    asymmetric_pairs: tuple[tuple[str, str], ...] = ()
    backward_calls: int = 0
    hessian_calls: int = 0  # calls of hvp (or of hessian, once)
    evaluations: int = 0  # forward calls of check 2 (also counted in the report's total)
    seconds: float = 0.0
    errors: tuple[str, ...] = ()  # what the Hessian source returned that could not be used
    notes: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "status", Status(self.status))
        object.__setattr__(self, "symmetric", Status(self.symmetric))

    @property
    def ok(self) -> bool:
        return self.status is not Status.FAIL

    @property
    def failing_blocks(self) -> tuple[BlockResult, ...]:
        return tuple(b for b in self.blocks if b.status is Status.FAIL)

    def block(self, rows: str, cols: str) -> BlockResult:
        """The block of ``rows`` x ``cols`` (KeyError naming the known ones otherwise)."""
        for b in self.blocks:
            if (b.rows, b.cols) == (rows, cols):
                return b
        raise KeyError(f"no block {rows} × {cols}; the report has {[b.name for b in self.blocks]}")
