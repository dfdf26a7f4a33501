"""One tensor of a target being probed: the numeric questions gradprobe asks of it.

A :class:`TensorProbe` holds the evaluator, the tensor's private values, its analytic
gradient, the loss at the base point, the type the forward computes in and the tolerance
model. Everything numeric about a tensor is a method of a probe or a function of one:
pairs of perturbations at given steps (:meth:`TensorProbe.pairs`), the loss along a
direction (:meth:`TensorProbe.along`), and restrictions to part of the tensor.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import Protocol

import numpy as np

from ..common.classes import dataclass
from ..common.errors import BadOutputError
from .evaluate import Perturbation
from .evaluator import Evaluator
from ..common.roundoff import is_narrow, rounding_units
from .widened import Widened, as_seen, root_mean_square

# Rounding noise of one loss value is taken as rounding_units(type) * eps * max(|f|, L), L the
# loss scale measured on the target (see roundoff.py and noise.py).
FLOOR_FRACTION = 1e-3  # denominators never fall below 1e-3 of the tensor's gradient scale
TARGET_FLOOR_FRACTION = 1e-4  # ... nor below 1e-4 of the target's largest tensor scale


SIXTEEN_BIT_EPS = float(np.finfo(np.float16).eps)  # 16-bit arithmetic keeps its own step rules (along.py)
ALONG_CHUNK = 1 << 16  # elements moved at a time along a direction
SHRINKS = 40  # a step that meets a non-finite loss shrinks 16-fold down to x's resolution


def _fields(p: Pairs) -> tuple[np.ndarray, ...]:
    return (p.f_plus, p.f_minus, p.h_plus, p.h_minus, p.noise)


class DrawnAgain(Protocol):
    """A vector kept as what draws it, read a block at a time (:class:`.drawn.Direction`)."""

    @property
    def size(self) -> int: ...

    def blocks(self, step: int) -> Iterable[np.ndarray]: ...


def _chunks(u: np.ndarray | DrawnAgain, step: int) -> Iterable[np.ndarray]:
    """``u`` a chunk of ``step`` at a time (a lazily drawn direction draws them in order)."""
    if isinstance(u, np.ndarray):
        return (u[lo:lo + step] for lo in range(0, u.size, step))
    return u.blocks(step)


@dataclass(frozen=True)
class Pairs:
    """The loss at x + h and x - h for several coordinates, with the distances really moved."""

    f_plus: np.ndarray
    f_minus: np.ndarray
    h_plus: np.ndarray
    h_minus: np.ndarray
    noise: np.ndarray  # absolute rounding noise of one loss value near these points

    @property
    def central(self) -> np.ndarray:
        with np.errstate(over="ignore", invalid="ignore"):  # losses near the type's range: inf, judged as such
            return (self.f_plus - self.f_minus) / (self.h_plus + self.h_minus)

    def sides(self, f0: float) -> tuple[np.ndarray, np.ndarray]:
        """The right and left one-sided quotients about the base loss ``f0``."""
        with np.errstate(over="ignore", invalid="ignore"):  # as in central
            return (self.f_plus - f0) / self.h_plus, (f0 - self.f_minus) / self.h_minus

    def fields(self) -> tuple[np.ndarray, ...]:
        return (self.f_plus, self.f_minus, self.h_plus, self.h_minus, self.noise)


class TensorProbe:
    """``tensor`` of the target behind ``evaluator``, at flat values ``x`` with analytic ``a``."""

    def __init__(
        self,
        evaluator: Evaluator,
        tensor: str,
        x: np.ndarray,
        analytic: np.ndarray | Widened,
        f0: float,
        compute_dtype: np.dtype,
        threshold: float,
        target_scale: float = 0.0,
        loss_scale: float | None = None,
        narrow: TensorProbe | None = None,
        jitter: Callable[[], np.ndarray | None] | None = None,
        own_rounding: Callable[[], np.ndarray | None] | None = None,
        own_code: TensorProbe | None = None,
        beside: Callable[[np.ndarray, np.ndarray], np.ndarray | None] | None = None,
    ) -> None:
        self.evaluator = evaluator
        self.tensor = tensor
        self.x = x  # flat, the tensor's own dtype (a private copy)
        self.a = analytic  # flat float64 (or read as float64: Widened)
        self.f0 = f0
        self.compute_dtype = np.dtype(compute_dtype)
        self.eps = float(np.finfo(self.compute_dtype).eps)
        self.rounding_units = rounding_units(self.compute_dtype)
        self.threshold = threshold
        rms = root_mean_square(analytic)
        self.grad_scale = rms  # the tensor's typical gradient
        self.x_scale = root_mean_square(x)  # params' rms
        if self.x_scale == 0 and is_narrow(self.compute_dtype) and self.eps < SIXTEEN_BIT_EPS:
            # A tensor all at 0 (a bias as initialised) says nothing of the range over which
            # the loss is smooth along it: the unit the first step assumes (max(1, |x|)),
            # not 0, which held the wide steps narrow arithmetic needs near the first step.
            self.x_scale = 1.0
        tiny = float(np.finfo(np.float64).tiny)
        self.tensor_floor = max(FLOOR_FRACTION * rms, tiny)  # the tensor's own scale only
        self.floor = max(self.tensor_floor, TARGET_FLOOR_FRACTION * target_scale)
        # |f| can be far below the size of the terms that round (a sum of signed terms):
        # the loss scale, when known, is the larger of the two.
        self.loss_scale = max(abs(f0), loss_scale or 0.0)
        # The same for a move of every element at once, where measured (move_noise); else 0.
        self.moved_scale = 0.0
        # Narrow code checked on its float64 run: the same tensor probed on the narrow code
        # itself, with the narrow gradient it really returns.
        self.narrow = narrow
        # How much backward's rounding varies near the point (measured on first use, see
        # point.Point.jitter).
        self.jitter = jitter
        # The same on the grid of the type it computes in, where coarser (16-bit code inside
        # wider arrays; point.Point.coarse_jitter).
        self.own_rounding = own_rounding
        # narrow code whose backward has no float64 run, judged against its float64 forward:
        # the same tensor probed on the narrow code itself (reconcile.own_code_reconciled).
        self.own_code = own_code
        # backward's value at coordinates moved alone just beside the point (point.Point.beside)
        self.beside = beside

    @property
    def size(self) -> int:
        return int(self.x.size)

    # -- tolerances -------------------------------------------------------------------

    def denominators(self, flat: np.ndarray, numeric: np.ndarray) -> np.ndarray:
        """The scale each coordinate's relative error is taken against."""
        return np.maximum(np.maximum(np.abs(self.a[flat]), np.abs(numeric)), self.floor)

    def tolerance(self, flat: np.ndarray, numeric: np.ndarray) -> np.ndarray:
        """The absolute discrepancy each coordinate may have: threshold times its scale."""
        return self.threshold * self.denominators(flat, numeric)

    def loss_noise(self, *values: np.ndarray) -> np.ndarray:
        """Rounding noise of loss values near ``values`` (absolute, per coordinate)."""
        size = np.full(np.shape(values[0]), self.loss_scale)
        for v in values:
            size = np.maximum(size, np.abs(v))
        return self.rounding_units * self.eps * size

    def moved_noise(self, *values: np.ndarray) -> np.ndarray:
        """The same for loss values at points where the whole tensor moved (a direction)."""
        return np.maximum(self.loss_noise(*values), self.rounding_units * self.eps * self.moved_scale)

    # -- steps ------------------------------------------------------------------------

    def prior_steps(self, flat: np.ndarray) -> np.ndarray:
        """eps**(1/3) * max(1, |x|), rounded to a power of two: the first guess of a step
        (Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1)."""
        size = np.maximum(1.0, np.abs(self.x[flat].astype(np.float64)))
        return np.exp2(np.round(np.log2(self.eps ** (1.0 / 3.0) * size)))

    def moved(self, flat: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, ...]:
        """(x + h, x - h) in the tensor's dtype and the distances the forward really sees.

        A step below the resolution of x reads back as 0; it is widened until it moves."""
        x = self.x[flat]
        h = np.asarray(h, dtype=np.float64).copy()
        base = as_seen(x, self.compute_dtype)
        for _ in range(8):
            with np.errstate(over="ignore", invalid="ignore"):  # a move past the type's range
                plus = (x + h).astype(x.dtype)  # (the arrays' or the one computed in): not
                minus = (x - h).astype(x.dtype)  # finite, and the pairs shrink it
                h_plus = as_seen(plus, self.compute_dtype) - base
                h_minus = base - as_seen(minus, self.compute_dtype)
            stuck = (h_plus <= 0) | (h_minus <= 0) | ~np.isfinite(h_plus) | ~np.isfinite(h_minus)
            if not stuck.any():
                break
            h = np.where(stuck, h * 16, h)
        return plus, minus, h_plus, h_minus

    # -- evaluations ------------------------------------------------------------------

    def pairs(self, flat: np.ndarray, h: np.ndarray) -> Pairs:
        """The loss at x + h and x - h for each coordinate ``flat[i]``: one batch of 2n calls.

        Where forward returns a non-finite value at a perturbed point (float32 overflow, a
        domain edge), the step of that coordinate shrinks 16-fold until it reaches a few units
        of x's resolution (a domain edge can sit any number of ulps away)."""
        h = np.array(h, dtype=np.float64)
        fields = list(_fields(self._pairs(flat, h)))
        smallest = 4 * self.resolution(flat)
        for _ in range(SHRINKS):
            bad = np.flatnonzero((~np.isfinite(fields[0]) | ~np.isfinite(fields[1])) & (h > smallest))
            if bad.size == 0:
                break
            h[bad] /= 16.0
            for mine, again in zip(fields, _fields(self._pairs(flat[bad], h[bad]))):
                mine[bad] = again
        p = Pairs(*fields)
        bad = np.flatnonzero(~np.isfinite(p.f_plus) | ~np.isfinite(p.f_minus))
        if bad.size:
            k = int(flat[bad[0]])
            raise BadOutputError(
                f"forward returned a non-finite value when {self.tensor}[{k}] (flat index) was "
                f"moved by {float(h[bad[0]]):.3g}, however small the step",
                fix="guard what overflows or divides by zero there (exp, log, 1/x) so forward "
                    "stays finite around the point")
        return p

    def resolution(self, flat: np.ndarray) -> np.ndarray:
        """The spacing of each x as the forward sees it (its dtype's, or the compute type's)."""
        x = self.x[flat]
        r = np.abs(np.spacing(x)).astype(np.float64)
        if np.finfo(self.compute_dtype).eps > np.finfo(x.dtype).eps:
            r = np.maximum(r, np.abs(np.spacing(x.astype(self.compute_dtype))).astype(np.float64))
        return r

    def _pairs(self, flat: np.ndarray, h: np.ndarray) -> Pairs:
        plus, minus, h_plus, h_minus = self.moved(flat, h)
        values = self.evaluator.single_moves(self.tensor, flat, (plus, minus))
        f_plus, f_minus = values[:, 0].copy(), values[:, 1].copy()
        noise = self.loss_noise(np.nan_to_num(f_plus), np.nan_to_num(f_minus))
        return Pairs(f_plus, f_minus, h_plus, h_minus, noise)

    def one_side(self, flat: np.ndarray, h: np.ndarray, sign: float) -> tuple[np.ndarray, np.ndarray]:
        """The loss at x + sign * h for each coordinate (one call each) and the distance
        really moved; non-finite values stay in (the caller decides)."""
        plus, minus, h_plus, h_minus = self.moved(flat, h)
        points, moved = (plus, h_plus) if sign > 0 else (minus, h_minus)
        return self.evaluator.single_moves(self.tensor, flat, (points,))[:, 0].copy(), moved

    def complex_losses(self, flat: np.ndarray, h: np.ndarray) -> np.ndarray:
        """The loss at x + i h for each coordinate (complex values; one call each)."""
        requests = [
            Perturbation(self.tensor, flat[i : i + 1], np.array([self.x[flat[i]] + 1j * h[i]]))
            for i in range(flat.size)
        ]
        return self.evaluator.losses(requests)

    def along(self, part: slice, u: np.ndarray | DrawnAgain,
              scales: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The loss with ``x[part] + c u`` for each scale ``c`` (one call each), and the
        analytic change ``a[part] . d`` for the moves ``d`` the forward really saw.

        Serially one moved copy exists at a time, in reused buffers (none for a float64 run
        of narrow code moved as a whole: the tensor is moved in place and put back from the
        narrow values, see :meth:`_restore_source`); a backend gets the whole batch at once."""
        x = self.x[part]
        a = self.a[part]
        coarser = np.finfo(self.compute_dtype).eps > np.finfo(x.dtype).eps
        serial = self.evaluator.backend is None
        back = self._restore_source(part) if serial else None
        point = x if back is not None else np.empty_like(x)
        values, requests, predicted = [], [], []
        for c in scales:
            if not serial:
                point = np.empty_like(x)
            change = 0.0
            # A chunk at a time: no float64 temporaries of the tensor's size.
            for lo, u_lo in zip(range(0, x.size, ALONG_CHUNK), _chunks(u, ALONG_CHUNK)):
                part_x = x[lo:lo + ALONG_CHUNK] if back is None else back[lo:lo + ALONG_CHUNK].astype(x.dtype)
                moved = part_x + c * u_lo
                point[lo:lo + ALONG_CHUNK] = moved
                seen = point[lo:lo + ALONG_CHUNK]
                if coarser:
                    d = as_seen(seen, self.compute_dtype) - as_seen(part_x, self.compute_dtype)
                else:
                    d = seen.astype(np.float64, copy=False) - part_x
                change += float(a[lo:lo + ALONG_CHUNK] @ d)
            predicted.append(change)
            requests.append(Perturbation(self.tensor, part, point))
            if serial:
                try:
                    values.append(self.evaluator.losses(requests).real)
                finally:
                    if back is not None:  # put back exactly: no second moved copy exists
                        for lo in range(0, x.size, ALONG_CHUNK):
                            x[lo:lo + ALONG_CHUNK] = back[lo:lo + ALONG_CHUNK]
                requests = []
        if requests:
            values.append(self.evaluator.losses(requests).real)
        return np.concatenate(values), np.array(predicted)

    def _restore_source(self, part: slice) -> np.ndarray | None:
        """For a float64 run of narrow code moved as a whole tensor: the narrow code's own
        values of the tensor (equal to these once widened, exactly), from which the tensor
        can be moved in place and put back; else None (a moved copy is made)."""
        own = self.evaluator.loss.workspace.owners.get(self.tensor)
        if (self.narrow is None or own is None or part.indices(self.size) != (0, self.size, 1)
                or not own.flags.c_contiguous or not np.shares_memory(self.x, own)
                or not own.flags.writeable):
            return None
        return self.narrow.x
