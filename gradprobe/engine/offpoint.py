"""A second look at coordinates judged at a kink: the same code at a point moved off it.

At a kink the numeric side sees only the two one-sided derivatives. Where one kink sits at
the point, a correct backward returns one of them (or a value between), and a value outside
fails. Where several kinks meet at the point (a max tied in many rows, a ReLU at zero for
many samples at once, upstream gradients of both signs), the values a correct backward may
return are no longer fixed by the two sides, the check has to accept a wide range, and a
wrong gradient can hide in it.

Moved by a small random step (every checked tensor at once, by MOVE of its scale, and at
least MOVE_STEPS first steps), and again by the opposite step (a ReLU that the one step
switches off, the other switches on), the kinks leave the point, the loss is smooth along those
coordinates, and the code's gradient there agrees with the numeric one or it does not. A
failure there fails the coordinate, with the moved point's numbers and a reason that says so.
A coordinate left undecided for kinks that passes plainly at both moved points becomes a kink
(several kinks meeting at the point leave no value a correct gradient cannot take; off them
the code is right on both sides). Any other outcome (a pass at one point only, a kink that did
not move, a point outside the code's domain) leaves the verdict as it was. Cost: the moved points'
preparation (about 6 calls and one backward call each, once per target) and the
coordinates' checks there.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any

import numpy as np

from ..common.errors import ProbeError
from ..settings.options import CheckOptions
from .coordinates import CoordinateOutcome, check_coordinates
from .domain import quiet
from .evaluate import LossFunction
from .point import Point, prepare
from .record import TensorRecord
from .sampling import tensor_rng
from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from .verdict import CLOSE_BOTH, OUTSIDE_SIDES, SHARED_POINT, SIGNIFICANCE, looked_at_again

MOVE = 2.0**-10  # of each element's scale (its own size or its tensor's rms)
MOVE_STEPS = 8.0  # and at least this many first steps, so that the kinks leave their reach
# A failure at a moved point counts only beyond SAFETY times the usual number of bounds: the
# kinks moved off the point still lie close by, and a kink whose jump is too small for the
# bend test can sit inside steps grown to beat rounding noise, where the tableau's bound is
# the least reliable (seen at 3.8 and 5.7 bounds on correct code; planted bugs at 3e3 and up).
SAFETY = 10.0
# Coordinates left undecided with a value outside a kink's resolved sides (OUTSIDE_SIDES: wrong
# unless several kinks meet at the point) that both moves leave so (the kink not carried past
# the steps that beat rounding noise) get one more pair of moves, WIDE of their scale, of the
# tensors holding them alone; only a plain failure there counts.
WIDE = 2.0**-2
CHUNK = 1 << 16  # elements moved at a time
# Undecided at a moved point with the analytic value outside the one-sided derivatives there.
OFF_THE_SIDES = (CLOSE_BOTH, OUTSIDE_SIDES, SHARED_POINT)

MOVED_FAIL = (
    "at a kink here; at a point moved off the kinks (every checked tensor moved by about "
    "{move:.0e} of its scale) the analytic gradient disagrees with the numeric one (values shown "
    "are the moved point's)"
)
WIDE_FAIL = (
    "undecided beside a kink here, and at points moved about {move:.0e} of the scale; at a point "
    "moved further (this tensor alone moved by about {wide:.2g} of its scale) the analytic gradient "
    "disagrees with the numeric one (values shown are that point's)"
)


class SecondLook:
    """Checks the kink coordinates of several tensors at two moved points (opposite steps),
    one point prepared (and kept) at a time."""

    def __init__(
        self, forward: Callable[..., Any], backward: Callable[..., Any], point: Point,
        settings: CheckOptions,
    ) -> None:
        """``settings`` as the check ran with (its threshold resolved)."""
        assert settings.threshold is not None
        self._forward, self._backward = forward, backward
        self._point = point
        self._settings = settings
        self._seed = settings.seed
        self._names = list(point.grads.values)  # the tensors that move: every checked one
        self.wide_failed: list[str] = []  # of the names settle returns, those failed moved WIDE

    def _moved(self, name: str, sign: float, move: float = MOVE) -> np.ndarray:
        """The tensor moved by ``sign`` times its random step, in its own dtype. Built in
        chunks, so that a large tensor costs one new array and no float64 temporaries."""
        x = self._point.ws.owners[name].reshape(-1)
        eps = float(np.finfo(self._point.numerics.dtype).eps)
        least = MOVE_STEPS * eps ** (1.0 / 3.0)  # times max(1, |x|): the first steps' reach
        rms = float(np.sqrt(np.mean(np.square(x, dtype=np.float64)))) if x.size else 0.0
        rng = tensor_rng(self._seed, name, "second look")
        moved = np.empty_like(x)
        for lo in range(0, x.size, CHUNK):
            part = x[lo:lo + CHUNK].astype(np.float64)
            size = np.maximum(move * np.maximum(np.abs(part), rms), least * np.maximum(np.abs(part), 1.0))
            u = rng.uniform(-1.0, 1.0, part.size)
            direction = 0.5 * (u + np.sign(u))  # uniform in (-1, -0.5) and (0.5, 1)
            moved[lo:lo + CHUNK] = part + sign * direction * size
        return moved.reshape(self._point.ws.owners[name].shape)

    def _prepared(self, sign: float, names: set[str], move: float = MOVE) -> Point | None:
        """The point moved by ``sign`` times each tensor's step (``move`` of its scale): every
        checked tensor at the usual move, the tensors ``names`` alone at a wider one."""
        p = self._point
        moving = self._names if move == MOVE else [n for n in self._names if n in names]
        ws = p.ws.replacing({name: self._moved(name, sign, move) for name in moving})
        evaluator = p.evaluator.sibling(LossFunction(self._forward, ws, None, moved_copy=True))
        try:
            with quiet():  # a point gradprobe moved to: the code's warnings there are not shown
                ready = prepare(self._forward, self._backward, ws, evaluator, self._seed, scratch=False)
        except ProbeError:  # outside the code's domain there: no evidence either way
            return None
        ready.keep_gradients(names)
        return ready

    def settle(self, records: list[TensorRecord]) -> list[str]:
        """Check the kink coordinates of ``records`` at the moved points; a record whose
        kink coordinates fail at one gets them failed (``record.moved``). The names of
        those, in the order they first failed."""
        kinked = {r.name: (r, np.flatnonzero(looked_at_again(r.outcome.status, r.outcome.reasons)))
                  for r in records if r.outcome is not None}
        kinked = {name: rk for name, rk in kinked.items() if rk[1].size}
        s = self._settings
        failed: list[str] = []
        # Per tensor, the coordinates that pass plainly at every moved point (both needed).
        agreed = {name: np.ones(which.size, dtype=bool) for name, (_, which) in kinked.items()}
        # Per tensor, the coordinates whose analytic value lies outside the one-sided
        # derivatives at every moved point too: kinks still crowd them there, or it is wrong.
        outside = {name: np.ones(which.size, dtype=bool) for name, (_, which) in kinked.items()}
        kinked_off = {name: np.zeros(which.size, dtype=bool) for name, (_, which) in kinked.items()}
        for sign in (1.0, -1.0):
            moved = self._prepared(sign, set(kinked))
            if moved is None:
                agreed = {name: ok & False for name, ok in agreed.items()}
                outside = {name: ok & False for name, ok in outside.items()}
                continue
            for name, (record, which) in kinked.items():
                if name not in moved.grads.values:
                    agreed[name][:] = False
                    outside[name][:] = False
                    continue
                current = record.final
                assert current is not None
                try:
                    there = check_coordinates(moved.probe(name, s.resolved_threshold), current.flat[which],
                                              s.method, s.recheck)
                except ProbeError:
                    agreed[name][:] = False
                    outside[name][:] = False
                    continue
                agreed[name] &= (there.status == PASS) & _own_size(there, s.resolved_threshold)
                outside[name] &= (there.status == INCONCLUSIVE) & np.array(
                    [r in OFF_THE_SIDES for r in there.reasons], dtype=bool)
                # a kink again at a moved point, the value beyond the threshold off the
                # numeric one there (corners where only f'' jumps read as kinks: a Huber loss's)
                kinked_off[name] |= (there.status == KINK) & (there.rel > s.resolved_threshold)
                merged = _failed_there(current, which, there)
                if merged is not None:
                    record.moved = merged
                    failed += [] if name in failed else [name]
            moved.release()
            del moved  # one moved copy of the target at a time
        for name, (record, which) in kinked.items():
            upgraded = _kinks_borne_out(record.final, which, agreed[name])
            if upgraded is not None:
                record.moved = upgraded
        return self._wider(kinked, failed, {name: outside[name] | (kinked_off[name] & ~agreed[name])
                                            for name in outside})

    def _wider(self, kinked: dict[str, tuple[TensorRecord, np.ndarray]], failed: list[str],
               outside: dict[str, np.ndarray]) -> list[str]:
        """The coordinates of ``kinked`` still undecided for kinks, or named in ``outside`` (per
        tensor over its kinked coordinates): their analytic value lay outside the one-sided
        derivatives at both moved points (kinks-830368: absolute values' residuals down to
        1e-9, an element 20% off judged `kink` at the point and undecided so at both), or a
        moved point judged them `kink` again beyond the threshold and none passed them
        (kinks-850999: Huber corners at every distance, where only f'' jumps, read as a kink
        at the point and at a moved point, an element 20% off), checked at two
        points moved WIDE of their tensors' scale (those tensors alone); a plain failure at
        either fails them. ``failed`` with the names of tensors failed here added."""
        still = {}
        for name, (record, which) in kinked.items():
            final = record.final
            assert final is not None
            left = which[((final.status[which] == INCONCLUSIVE)
                          & np.array([final.reasons[j] == OUTSIDE_SIDES for j in which], dtype=bool))
                         | (outside[name] & (final.status[which] != FAIL))]
            if left.size:
                still[name] = (record, left)
        s = self._settings
        for sign in ((1.0, -1.0) if still else ()):
            moved = self._prepared(sign, set(still), WIDE)
            if moved is None:
                continue
            for name, (record, which) in still.items():
                current = record.final
                assert current is not None
                if name not in moved.grads.values or not np.any(current.status[which] != FAIL):
                    continue
                try:
                    there = check_coordinates(moved.probe(name, s.resolved_threshold), current.flat[which],
                                              s.method, s.recheck)
                except ProbeError:
                    continue
                merged = _failed_there(current, which, there, WIDE)
                if merged is not None:
                    record.moved = merged
                    failed += [] if name in failed else [name]
                    self.wide_failed += [] if name in self.wide_failed else [name]
            moved.release()
            del moved
        return failed


def _own_size(there: CoordinateOutcome, threshold: float) -> np.ndarray:
    """Per coordinate checked at a moved point: its pass holds at the coordinate's own size
    there, not only under its tensor's floor. A coordinate whose gradient at the moved point
    lies far below its tensor's largest passes whatever its error (steep-520009: a pole
    6e-7 from the point, its element 20% off, 1e15 at the point and far smaller at both moved
    points): that is no sign the code is right off the point."""
    own = np.maximum(np.abs(there.analytic), np.abs(there.numeric))
    with np.errstate(invalid="ignore"):
        return there.abs <= threshold * own


def _kinks_borne_out(outcome: CoordinateOutcome | None, which: np.ndarray,
                     agreed: np.ndarray) -> CoordinateOutcome | None:
    """``outcome`` with the coordinates at positions ``which`` left undecided because the steps
    kept crossing kinks, and passed at both moved points (``agreed``), judged `kink`: kinks are
    seen there, several meeting at the point leave no value a correct gradient cannot take (see
    kinks.py), and off them, on both sides, the code's gradient is the loss's. None where there
    is none."""
    if outcome is None:
        return None
    k = which[agreed & (outcome.status[which] == INCONCLUSIVE)]
    if k.size == 0:
        return None
    status = outcome.status.copy()
    status[k] = KINK
    reasons = list(outcome.reasons)
    for j in k.tolist():
        reasons[j] = None
    return replace(outcome, status=status, reasons=tuple(reasons))


def _failed_there(outcome: CoordinateOutcome, which: np.ndarray, there: CoordinateOutcome,
                  move: float = MOVE) -> CoordinateOutcome | None:
    """``outcome`` with the coordinates at positions ``which`` that fail plainly in ``there``
    (the same coordinates checked at a moved point) failed, with the moved point's numbers
    where they fail worst; None when none does."""
    plain = there.abs > SAFETY * SIGNIFICANCE * there.error_estimate
    worse = (outcome.status[which] != FAIL) | (there.rel > outcome.rel[which])
    failed = (there.status == FAIL) & plain & worse
    if not failed.any():
        return None
    where, k = which[failed], np.flatnonzero(failed)
    fields = {f: getattr(outcome, f).copy() for f in
              ("analytic", "numeric", "error_estimate", "rel", "abs", "scale", "status")}
    for field, values in fields.items():
        values[where] = getattr(there, field)[k]
    reasons = list(outcome.reasons)
    for j in where.tolist():
        reasons[j] = MOVED_FAIL.format(move=move) if move == MOVE else WIDE_FAIL.format(move=MOVE, wide=move)
    return replace(outcome, reasons=tuple(reasons), evaluations=outcome.evaluations + there.evaluations,
                   **fields)
