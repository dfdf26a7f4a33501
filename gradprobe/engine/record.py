"""One tensor's check from planning to report.

The runner makes a :class:`TensorRecord` per tensor it reports on; each stage annotates it
(the check: :func:`.tensor_check.check_tensor`; the second look: :mod:`.offpoint`; the hints:
the runner), and the report's :class:`~gradprobe.report.model.TensorResult` is built once, at the
end, by :meth:`TensorRecord.result`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..common.classes import dataclass
from ..report.model import DirectionResult, TensorResult
from ..common.status import FAIL, Status
from .coordinates import CoordinateOutcome
from .summary import tensor_result
from .verdict import looked_at_again

if TYPE_CHECKING:
    from ..hints import Evidence

UNCONFIRMED = (
    "a random-direction check disagrees beyond the threshold, but localisation confirmed "
    "no coordinate (several small errors, or kinks along the direction)"
)


@dataclass
class TensorRecord:
    """What is known of one tensor: set at planning, annotated by each stage."""

    name: str
    layer: str
    kind: str  # "param", "input" or "unknown" (a gradient for a name that is neither)
    shape: tuple[int, ...]
    dtype: str
    problem: str | None = None  # why its gradient could not be compared at all (it fails)
    problem_at: tuple[tuple[int, ...], ...] = ()  # the elements the problem is in, where known
    # The check (tensor_check): coordinates, directions, localisation, and what they cost.
    outcome: CoordinateOutcome | None = None
    directions: tuple[DirectionResult, ...] = ()
    located_evaluations: int | None = None
    evaluations: int = 0
    unconfirmed: bool | str = False  # a direction disagrees that no coordinate confirms (why, if said)
    fails_along: str | None = None  # why the tensor fails along a direction though no coordinate does
    # The second look (offpoint): the outcome with kink coordinates that fail off the point
    # failed, and undecided ones borne out at both moved points made kinks (None: neither, or
    # no second look).
    moved: CoordinateOutcome | None = None
    hint: str | None = None

    @property
    def final(self) -> CoordinateOutcome | None:
        """The coordinates' outcome after every stage."""
        return self.moved if self.moved is not None else self.outcome

    @property
    def kinked(self) -> bool:
        """Some checked coordinate is judged at a kink, or left undecided by steps crossing
        kinks (a second look may settle it)."""
        return self.outcome is not None and bool(np.any(looked_at_again(self.outcome.status,
                                                                         self.outcome.reasons)))

    def evidence(self) -> Evidence | None:
        """What hints are drawn from: the checked coordinates and which of them fail."""
        o = self.final
        if o is None:
            return None
        from ..hints import Evidence  # local: the hint rules load where a hint is drawn

        return Evidence(self.name, tuple(self.shape), o.flat, o.analytic, o.numeric, o.status == FAIL)

    def result(self) -> TensorResult:
        """The report's result for this tensor."""
        if self.problem is not None or self.outcome is None:
            return TensorResult(
                name=self.name, layer=self.layer, kind=self.kind, shape=tuple(self.shape),
                dtype=self.dtype, checked=0, failed=len(self.problem_at), kinks=0, status=Status.FAIL,
                hint=self.problem, bad_indices=self.problem_at,
                worst_index=self.problem_at[0] if self.problem_at else None)
        spent = self.evaluations
        if self.moved is not None:  # the second look's calls for this tensor
            spent += self.moved.evaluations - self.outcome.evaluations
        final = self.final
        assert final is not None, "a tensor without a problem has been checked"
        return tensor_result(
            self.name, self.layer, self.kind, self.shape, np.dtype(self.dtype), final,
            hint=self.hint, directions=self.directions,
            located_evaluations=self.located_evaluations, evaluations=spent,
            doubt=self.unconfirmed if isinstance(self.unconfirmed, str)
            else UNCONFIRMED if self.unconfirmed else None, fails=self.fails_along)
