"""The counter of every forward call of a check: an :class:`Evaluator` turns batches of
:class:`~gradprobe.engine.moves.Perturbation` into loss values through one
:class:`~gradprobe.engine.evaluate.LossFunction`, serially or through an executor backend,
and reports progress.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from typing import Any, Protocol

import numpy as np

from .evaluate import LossFunction
from .moves import Perturbation, covers, whole_view

__all__ = ["Backend", "Evaluator", "Progress"]


class Progress(Protocol):
    """Told how many evaluations are planned and how many are done."""

    def planned(self, evaluations: int) -> None: ...

    def done(self, evaluations: int) -> None: ...


class Backend(Protocol):
    """Evaluates a batch of perturbations somewhere (worker processes, a cluster)."""

    def losses(self, perturbations: Sequence[Perturbation]) -> list[float]: ...


class Evaluator:
    """Counts and runs every forward call of a check, serially or through a backend.

    Every call to the user's forward goes through one of its methods, and each is counted
    here: perturbation batches (:meth:`losses`), the base point (:meth:`base`), several
    perturbations at once (:meth:`loss_with`), a call on other arrays (:meth:`raw`), and
    calls on another workspace of the same target (:meth:`sibling`, sharing the count).
    """

    def __init__(
        self,
        loss: LossFunction,
        backend: Backend | None = None,
        progress: Progress | None = None,
        tally: list[int] | None = None,
    ) -> None:
        self.loss = loss
        self.backend = backend
        self.progress = progress
        self._tally = tally if tally is not None else [0]

    @property
    def count(self) -> int:
        """Forward calls so far, by this evaluator and its siblings."""
        return self._tally[0]

    def _counted(self, calls: int) -> None:
        self._tally[0] += calls

    def sibling(self, loss: LossFunction, backend: Backend | None = None) -> Evaluator:
        """An evaluator of ``loss`` (another workspace of the target) sharing this count and
        progress; serial unless given a ``backend``."""
        return Evaluator(loss, backend, self.progress, self._tally)

    def base(self) -> float:
        self._counted(1)
        return self.loss.base()

    def base_with_type(self) -> tuple[float, np.dtype]:
        """The base loss and the floating type forward returned it in."""
        self._counted(1)
        return self.loss.base_with_type()

    def raw(self, params: Any, inputs: Any) -> Any:
        """forward's own result on other arrays (writable scratch copies), unconverted."""
        self._counted(1)
        return self.loss.raw(params, inputs)

    def loss_with(self, moves: Sequence[Perturbation]) -> float:
        """The loss with every perturbation in ``moves`` applied at once (one call)."""
        ws = self.loss.workspace
        # A tensor moved as a whole is handed to forward as a read-only view of the new
        # values in its place (no copy of the old values to restore: memory on a large one).
        once = Counter(p.tensor for p in moves)
        whole = {p.tensor: whole_view(p, ws.owners[p.tensor]) for p in moves
                 if once[p.tensor] == 1 and covers(p, ws.owners[p.tensor])}
        parts = [p for p in moves if p.tensor not in whole]
        saved = [ws.owners[p.tensor].flat[p.index].copy() for p in parts]
        try:
            for p in parts:
                ws.owners[p.tensor].flat[p.index] = p.values
            self._counted(1)
            if not whole:
                return self.loss.current()
            params, inputs = ws.trees_with(whole)
            return self.loss.current(params, inputs)
        finally:
            for p, old in zip(parts, saved):
                ws.owners[p.tensor].flat[p.index] = old

    def single_moves(self, tensor: str, flat: np.ndarray, points: tuple[np.ndarray, ...]) -> np.ndarray:
        """For each coordinate ``flat[i]`` of ``tensor`` and each array of ``points``, the loss
        with that coordinate moved to the array's ``[i]``: ``(len(flat), len(points))``
        values. Serially (real values) without a Perturbation per call; else as
        :meth:`losses`."""
        n = flat.size * len(points)
        if n == 0:
            return np.empty((flat.size, len(points)))
        real = all(np.isrealobj(v) for v in points) and self.loss.workspace.owners[tensor].dtype.kind != "c"
        if (self.backend is not None and n > 1) or not real:
            requests = [Perturbation(tensor, flat[i:i + 1], v[i:i + 1]) for i in range(flat.size) for v in points]
            return self.losses(requests).real.reshape(flat.size, len(points))
        if self.progress:
            self.progress.planned(n)
        return self.loss.single_moves(tensor, flat, points, self._tick)

    def _tick(self) -> None:
        self._tally[0] += 1
        if self.progress:
            self.progress.done(1)

    def losses(self, perturbations: Sequence[Perturbation]) -> np.ndarray:
        """Loss values, one per perturbation, in order."""
        if not perturbations:
            return np.empty(0)
        if self.progress:
            self.progress.planned(len(perturbations))
        complex_step = np.iscomplexobj(perturbations[0].values)
        if self.backend is not None and not complex_step and len(perturbations) > 1:
            values = np.asarray(self.backend.losses(perturbations), dtype=np.float64)
            self._counted(len(perturbations))
            if self.progress:
                self.progress.done(len(perturbations))
            return values
        out = np.empty(len(perturbations), dtype=np.complex128 if complex_step else np.float64)
        for i, p in enumerate(perturbations):
            out[i] = self.loss.at(p)
            self._counted(1)
            if self.progress:
                self.progress.done(1)
        return out
