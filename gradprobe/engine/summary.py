"""Turning per-coordinate outcomes into a :class:`TensorResult` (pure)."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..report.model import CheckedCoordinates, CoordinateDetail, DirectionResult, TensorResult
from .coordinates import CoordinateOutcome
from ..common.status import FAIL, INCONCLUSIVE, KINK, Status

MAX_LISTED = 100



class SparseErrors:
    """A tensor's relative error per element, held for the checked elements only (a sampled
    tensor of a million elements keeps its few dozen, not a million NaNs); numpy sees the
    dense array, NaN where not checked."""

    def __init__(self, shape: tuple[int, ...], flat: np.ndarray, rel: np.ndarray) -> None:
        self.shape, self.flat, self.rel = tuple(shape), flat, rel

    def __array__(self, dtype: np.dtype | None = None, copy: bool | None = None) -> np.ndarray:
        dense = np.full(self.shape, np.nan, dtype=dtype or np.float64)
        dense.reshape(-1)[self.flat] = self.rel
        return dense

    def __getitem__(self, index: Any) -> Any:
        return np.asarray(self)[index]


def _index(flat: int, shape: tuple[int, ...]) -> tuple[int, ...]:
    return tuple(int(i) for i in np.unravel_index(int(flat), shape))


def _listed(outcome: CoordinateOutcome, mask: np.ndarray) -> np.ndarray:
    """Positions of the (at most MAX_LISTED) worst coordinates in ``mask``, in index order."""
    chosen = np.flatnonzero(mask)
    chosen = chosen[np.argsort(-outcome.rel[chosen], kind="stable")[:MAX_LISTED]]
    return chosen[np.argsort(outcome.flat[chosen], kind="stable")]


def _details(outcome: CoordinateOutcome, shape: tuple[int, ...]) -> tuple[CoordinateDetail, ...]:
    doubtful = _listed(outcome, (outcome.status == FAIL) | (outcome.status == INCONCLUSIVE))
    return tuple(
        CoordinateDetail(
            index=_index(outcome.flat[k], shape),
            analytic=float(outcome.analytic[k]),
            numeric=float(outcome.numeric[k]),
            error_estimate=float(outcome.error_estimate[k]),
            rel_error=float(outcome.rel[k]),
            status=Status.of_code(outcome.status[k]),
            reason=outcome.reasons[k],
        )
        for k in doubtful
    )


def tensor_result(
    name: str,
    layer: str,
    kind: str,
    shape: tuple[int, ...],
    dtype: np.dtype,
    outcome: CoordinateOutcome,
    hint: str | None = None,
    directions: tuple[DirectionResult, ...] = (),
    located_evaluations: int | None = None,
    evaluations: int | None = None,
    doubt: str | None = None,
    fails: str | None = None,
) -> TensorResult:
    """Summarise the checked coordinates of one tensor (and its direction checks). Its
    status is its worst coordinate's; ``doubt`` (a reason) makes a tensor whose coordinates
    pass or sit at kinks inconclusive; ``fails`` (a reason) makes one whose coordinates do
    not fail fail, the reason leading its hint."""
    shape = tuple(shape)
    s = outcome.status
    failing = s == FAIL
    judged = s != KINK
    worst = max_abs = max_rel = worst_noise = None
    if judged.any():
        k = int(np.argmax(np.where(judged, outcome.rel, -np.inf)))
        worst = _index(outcome.flat[k], shape)
        max_rel = float(outcome.rel[k])
        max_abs = float(outcome.abs[judged].max())
        if outcome.scale[k] > np.finfo(np.float64).tiny:  # else no scale: every gradient 0
            worst_noise = float(outcome.error_estimate[k] / outcome.scale[k])
    estimates = outcome.error_estimate[np.isfinite(outcome.error_estimate)]
    failed = int(failing.sum())
    error_map = SparseErrors(shape, outcome.flat.copy(), outcome.rel.copy())
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        noise = outcome.error_estimate / outcome.scale
    ranks = s.astype(np.int8)  # the engine's codes are the statuses' codes
    coordinates = CheckedCoordinates(error_map.flat, error_map.rel, noise, ranks, outcome.numeric.copy(),
                                     outcome.scale.copy())
    inconclusive = int((s == INCONCLUSIVE).sum())
    kinks = int((s == KINK).sum())
    status = Status.of_code(s.max()) if s.size else Status.PASS
    reason = next((r for r, st in zip(outcome.reasons, s) if st == INCONCLUSIVE and r), None)
    if doubt is not None and status < Status.INCONCLUSIVE:
        status, reason = Status.INCONCLUSIVE, doubt
    elif doubt is not None and status is Status.INCONCLUSIVE and reason and doubt not in reason:
        reason = f"{reason}; and {doubt}"  # what the directions could not resolve is said too
    if fails is not None and status < Status.FAIL:
        status, hint = Status.FAIL, fails + (f"; {hint}" if hint else "")
    return TensorResult(
        name=name,
        layer=layer,
        kind=kind,
        shape=shape,
        dtype=str(np.dtype(dtype)),
        checked=int(outcome.flat.size),
        failed=failed,
        kinks=kinks,
        inconclusive=inconclusive,
        status=status,
        max_abs_error=max_abs,
        max_rel_error=max_rel,
        worst_index=worst,
        bad_indices=tuple(_index(outcome.flat[k], shape) for k in _listed(outcome, failing)),
        kink_indices=tuple(_index(k, shape) for k in np.sort(outcome.flat[s == KINK][:MAX_LISTED])),
        max_error_estimate=float(estimates.max()) if estimates.size else None,
        worst_noise=worst_noise,
        details=_details(outcome, shape),
        hint=hint,
        inconclusive_reason=reason if status is Status.INCONCLUSIVE else None,
        evaluations=outcome.evaluations if evaluations is None else evaluations,
        directions=directions,
        located_evaluations=located_evaluations,
        error_map=error_map,
        coordinates=coordinates,
    )
