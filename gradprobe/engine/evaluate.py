"""The one path by which the user's forward is evaluated.

A :class:`Perturbation` says which coordinates of which tensor take which values; a
:class:`LossFunction` gives the loss there (:class:`.evaluator.Evaluator` counts every call
and runs batches, serially or through an executor backend). The loss is the forward's
scalar, or ``sum(grad_output * forward(...))`` when the forward returns an array.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from ..common.errors import BadOutputError, InPlaceWriteError, ProbeError, UserCodeError, summarise
from ..common.guard import ExitAttempt, exit_error
from ..common.tensors import Workspace
from .domain import Key, MovedCalls, Watch
from .loss_value import is_read_only_write, output_to_loss, overflowed
from .moves import One, Perturbation

__all__ = ["LossFunction", "Perturbation", "output_to_loss"]

OUTSIDE = "forward warned at a point moved off the base point (outside its domain there)"


class LossFunction:
    """forward as a scalar function of the workspace's current values; what it warns at
    moved points is caught, and marks them outside its domain (see domain.py)."""

    def __init__(
        self, forward: Callable[..., Any], workspace: Workspace, grad_output: np.ndarray | None,
        moved_copy: bool = False,
    ) -> None:
        self.forward = forward
        self.workspace = workspace
        self.grad_output = grad_output
        self._complex: dict[str, np.ndarray] = {}
        self._watch = Watch(show=not moved_copy)  # a moved copy's base shows no warnings
        self._unsure: tuple[set[Key], float | complex] | None = None  # warned, base not known
        self._moved: MovedCalls | None = None  # serial calls at moved points (single_moves)

    def _call(self, params: Any, inputs: Any, p: Perturbation | One | None, moved: bool = False) -> float | complex:
        moved = moved or p is not None
        try:
            if moved and self._moved is not None:
                out, warned = self._moved.call(self.forward, params, inputs)
            else:
                out, warned = self._watch.call(self.forward, params, inputs, moved)
        except ProbeError as exc:  # the array boundary's own sentence (an in-place write)
            raise type(exc)(exc.message + self._where(p), value=exc.value) from exc
        except Exception as exc:
            where = self._where(p)
            if is_read_only_write(exc):
                raise InPlaceWriteError(
                    f"forward writes into the arrays it is given{where} ({summarise(exc)})"
                ) from exc
            raise UserCodeError(f"forward raised {summarise(exc)}{where}") from exc
        except (SystemExit, ExitAttempt) as exc:
            raise exit_error(exc, "forward", self._where(p)) from exc
        finally:
            self._forget(params)
        try:
            value = output_to_loss(out, self.grad_output, "")
        except BadOutputError as exc:
            if moved and overflowed(out):
                if p is None:
                    raise BadOutputError(exc.message + " at a moved point", value=out) from None
                return math.nan  # a perturbed point outside forward's range: the caller
                # shrinks the step, and names the coordinate if that does not help
            raise BadOutputError(exc.message + self._where(p), value=out) from None
        if warned and self._watch.base is None:
            self._unsure = (warned, value)  # decided once the base point's warnings are known
            return math.nan
        if warned and self._watch.outside(warned):
            if p is None:
                raise BadOutputError(OUTSIDE)
            return math.nan
        return value

    def _learn_base_warnings(self) -> None:
        """The base point's own warnings, for a loss whose base was never evaluated here (a
        worker's): one more forward call, at the workspace's own values."""
        self._call(self.workspace.params_tree, self.workspace.inputs_tree, None)

    def _where(self, p: Perturbation | One | None) -> str:
        if p is None:
            return ""
        return f" when {p.describe(self.workspace.owners[p.tensor].shape)} was perturbed"

    def base(self) -> float:
        ws = self.workspace
        return float(np.real(self._call(ws.params_tree, ws.inputs_tree, None)))

    def raw(self, params: Any, inputs: Any) -> Any:
        """forward's own result on other arrays at the base point's values, unconverted."""
        try:
            return self._watch.call(self.forward, params, inputs, moved=False)[0]
        finally:
            self._forget(params)

    def release(self) -> None:
        """This workspace will not be evaluated again: a forward that keeps what it built
        from its trees lets go of it (so the workspace's arrays can be freed)."""
        forget = getattr(self.forward, "forget", None)
        if forget is not None:
            forget(self.workspace.params_tree)

    def _forget(self, params: Any) -> None:
        """A forward that keeps what it built from the trees it was last handed (the array
        boundary's) lets go of one that is not this workspace's own: a moved copy or scratch
        copies are not held past their call."""
        if params is not self.workspace.params_tree:
            forget = getattr(self.forward, "forget", None)
            if forget is not None:
                forget(params)

    def base_with_type(self) -> tuple[float, np.dtype]:
        """The loss at the base point and the floating type forward returned it in."""
        ws = self.workspace
        out, _ = self._watch.call(self.forward, ws.params_tree, ws.inputs_tree, moved=False)
        dtype = np.asarray(out).dtype
        return float(np.real(output_to_loss(out, self.grad_output, ""))), dtype

    def at(self, p: Perturbation) -> float | complex:
        value = self._at(p)
        if self._unsure is None:
            return value
        warned, value = self._unsure
        self._unsure = None
        self._learn_base_warnings()
        return math.nan if self._watch.outside(warned) else value

    def current(self, params: Any = None, inputs: Any = None) -> float:
        """The loss at the workspace's values as the caller moved them, or at the trees
        given (a moved point: BadOutputError where it lies outside forward's domain)."""
        ws = self.workspace
        value = self._call(ws.params_tree if params is None else params,
                           ws.inputs_tree if inputs is None else inputs, None, moved=True)
        if self._unsure is not None:
            self._unsure = None
            raise BadOutputError(OUTSIDE)  # not to be decided here: no evidence either way
        return float(np.real(value))

    def _at(self, p: Perturbation) -> float | complex:
        owner = self.workspace.owners[p.tensor]
        if p.values.dtype.kind == "c" and owner.dtype.kind != "c":
            return self._at_complex(p)
        if isinstance(p.index, np.ndarray) and p.index.size == 1:  # scalar indexing is cheaper
            k = int(p.index[0])
            old = owner.flat[k]
            owner.flat[k] = p.values[0]
            try:
                return self._call(self.workspace.params_tree, self.workspace.inputs_tree, p)
            finally:
                owner.flat[k] = old
        if isinstance(p.index, slice) and p.index.start == 0 and p.index.stop == owner.size:
            # The whole tensor moves: hand forward a read-only view of the new values in its
            # place (no copy of the old values, nothing to restore).
            view = p.values.reshape(owner.shape).view()
            view.flags.writeable = False
            params, inputs = self.workspace.trees_with({p.tensor: view})
            return self._call(params, inputs, p)
        target = owner.reshape(-1) if owner.flags.c_contiguous else owner.flat
        saved = target[p.index].copy()
        target[p.index] = p.values
        try:
            return self._call(self.workspace.params_tree, self.workspace.inputs_tree, p)
        finally:
            target[p.index] = saved

    def single_moves(self, tensor: str, flat: np.ndarray, points: tuple[np.ndarray, ...],
                     tick: Callable[[], None]) -> np.ndarray:
        """Serially, for each coordinate ``flat[i]`` and each array of ``points`` in turn, the
        loss with ``tensor.flat[flat[i]]`` set to that array's ``[i]`` (real values of a real
        tensor): ``(len(flat), len(points))`` values, as :meth:`at` gives them one
        Perturbation at a time (the same calls, warnings, messages and restored values),
        without making one per call. ``tick`` is called after each call."""
        owner = self.workspace.owners[tensor]
        params, inputs = self.workspace.params_tree, self.workspace.inputs_tree
        out = np.empty((flat.size, len(points)))
        one = One(tensor, flat, points[0])
        with self._watch.moved_calls() as self._moved:
            try:
                self._single_moves(owner, params, inputs, flat, points, one, out, tick)
            finally:
                self._moved = None
        return out

    def _single_moves(self, owner: np.ndarray, params: Any, inputs: Any, flat: np.ndarray,
                      points: tuple[np.ndarray, ...], one: One, out: np.ndarray,
                      tick: Callable[[], None]) -> None:
        for i, k in enumerate(flat.tolist()):
            old = owner.flat[k]
            one.i = i
            try:
                for j, values in enumerate(points):
                    owner.flat[k] = values[i]
                    one.values = values
                    value = self._call(params, inputs, one)
                    if self._unsure is not None:
                        owner.flat[k] = old  # the base point's own warnings, learnt there
                        warned, value = self._unsure
                        self._unsure = None
                        self._learn_base_warnings()
                        value = math.nan if self._watch.outside(warned) else value
                    out[i, j] = value
                    tick()
            finally:
                owner.flat[k] = old

    def _at_complex(self, p: Perturbation) -> complex:
        work = self._complex.get(p.tensor)
        if work is None:
            work = self.workspace.owners[p.tensor].astype(np.complex128)
            self._complex[p.tensor] = work
        old = work.flat[p.index].copy()
        work.flat[p.index] = p.values
        try:
            params, inputs = self.workspace.trees_with({p.tensor: work})
            return complex(self._call(params, inputs, p))
        finally:
            work.flat[p.index] = old
