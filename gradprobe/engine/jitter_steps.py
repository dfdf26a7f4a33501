"""How backward's rounding varies near a point (:func:`measured_jitter`, what point.Point's
jitter and spreads read), and the moves and differences it is measured with, each built in
one array in the tensor's own type where that is exact: the same numbers as written out on
float64 copies, without their full-size temporaries."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..common.errors import ProbeError
from ..common.tensors import Handed, Workspace
from .domain import quiet
from .gradients import validate
from .preflight import call_backward
from .sampling import SIGN_CHUNK, random_negative, tensor_rng

JITTER_ULPS = 4.0  # units in the last place every checked tensor moves to measure the jitter
JITTER_SPAN = 5  # backward calls: points x + d ... x + 5d, three second differences


def jitter_step(x: np.ndarray, ulps: float, rng: np.random.Generator, grid: np.dtype | None) -> np.ndarray:
    """``ulps`` units of ``x``'s grid (or of ``grid`` where coarser), at random signs, in
    ``x``'s own type: a power of two times a small whole number, exact there."""
    negative = random_negative(rng, x.shape)  # rng.choice([-1.0, 1.0]) < 0, drawn in chunks
    step = np.asarray(np.abs(x))  # one array of the tensor's size, made the step in place
    np.spacing(step, out=step)
    if grid is not None and np.finfo(grid).eps > np.finfo(x.dtype).eps:  # the grid it computes on
        step = np.maximum(step, np.abs(np.spacing(np.abs(x).astype(grid))).astype(x.dtype))
    step = np.asarray(step)  # a 0-d tensor's too, so the sign is set in place
    step *= ulps
    np.negative(step, out=step, where=negative)
    return step


def second_difference(g: np.ndarray, mid: np.ndarray, first: np.ndarray) -> np.ndarray:
    """|g - 2 mid + first| in float64, flat, in one array: the same operations in the same
    order as on float64 copies of the three (-2 mid is exact, and a + (-b) is a - b)."""
    out = np.multiply(mid, -2.0, dtype=np.float64).reshape(-1)
    out += g.reshape(-1)
    out += first.reshape(-1)
    return np.abs(out, out=out)


BLOCK = 1 << 16  # values a block at a time: temporaries of a block, never of a whole tensor


class Narrowed:
    """Non-negative float64 values kept as float32 where that holds them exactly, with the few
    that it does not (index, float64 value) beside: half the memory of a float64 array, the
    same values read back (:meth:`block`, :func:`widened`)."""

    def __init__(self, size: int) -> None:
        self.low = np.zeros(size, dtype=np.float32)  # not empty: a later block widened unwritten warns
        self.at = np.empty(0, dtype=np.int64)  # sorted flat indices of the values float32 misses
        self.exact = np.empty(0, dtype=np.float64)

    @property
    def size(self) -> int:
        return self.low.size

    def block(self, part: slice) -> np.ndarray:
        """The float64 values of ``part`` (a slice with a start and stop), in a new array."""
        out = self.low[part].astype(np.float64)
        lo, hi = np.searchsorted(self.at, (part.start, part.stop))
        out[self.at[lo:hi] - part.start] = self.exact[lo:hi]
        return out

    def widened_from(self, stop: int, at: np.ndarray, exact: np.ndarray) -> np.ndarray:
        """As float64: values before ``stop`` with the exceptions ``at``/``exact``, values
        from ``stop`` on with the exceptions kept until now."""
        out = self.low.astype(np.float64)
        later = self.at >= stop
        out[self.at[later]] = self.exact[later]
        out[at] = exact
        return out


def widened(values: np.ndarray | Narrowed) -> np.ndarray:
    """``values`` as one float64 array (a :class:`Narrowed` widened, exactly)."""
    if not isinstance(values, Narrowed):
        return np.asarray(values, dtype=np.float64)
    out = values.low.astype(np.float64)
    out[values.at] = values.exact
    return out


def add_into(out: np.ndarray, values: np.ndarray | Narrowed) -> None:
    """``out += values`` in float64, a block at a time (the same sums as on a widened copy)."""
    if not isinstance(values, Narrowed):
        out += values
        return
    for start in range(0, out.size, BLOCK):
        part = slice(start, min(start + BLOCK, out.size))
        out[part] += values.block(part)


def largest_second_difference(most: np.ndarray | Narrowed | None, g: np.ndarray, mid: np.ndarray,
                              first: np.ndarray, compact: bool = False) -> np.ndarray | Narrowed:
    """``most`` raised to :func:`second_difference` (g, mid, first) where that is larger, a
    block at a time (a new flat float64 array when ``most`` is None): the same values as the
    whole-size difference and ``np.maximum``, with no whole-size temporary.

    ``compact``: a new one is a :class:`Narrowed` (second differences of nearby float32
    gradients are mostly exact in float32: half the memory), float64 once more than an
    eighth of its values are not; read it with :func:`widened` or :func:`add_into`."""
    g, mid, first = (np.asarray(v).reshape(-1) for v in (g, mid, first))
    parts = [slice(s, min(s + BLOCK, g.size)) for s in range(0, g.size, BLOCK)]
    if isinstance(most, Narrowed) or (most is None and compact):
        kept = Narrowed(g.size) if most is None else most
        at: list[np.ndarray] = []
        exact: list[np.ndarray] = []
        missing = 0
        for k, part in enumerate(parts):
            second = second_difference(g[part], mid[part], first[part])
            if most is not None:
                np.maximum(kept.block(part), second, out=second)
            with np.errstate(over="ignore", under="ignore", invalid="ignore"):
                narrowed = second.astype(np.float32)  # beyond float32's range: inf, not equal
            kept.low[part] = narrowed
            missed = np.flatnonzero(narrowed != second)
            at.append(missed + part.start)
            exact.append(second[missed])
            missing += missed.size
            if missing > g.size // 8:  # float64 from the next block on
                whole = kept.widened_from(part.stop, np.concatenate(at), np.concatenate(exact))
                return _raised(whole, g, mid, first, parts[k + 1:], fresh=most is None)
        kept.at = np.concatenate([kept.at[:0], *at])
        kept.exact = np.concatenate([kept.exact[:0], *exact])
        return kept
    if most is None:
        return _raised(np.empty(g.size, dtype=np.float64), g, mid, first, parts, True)
    return _raised(most, g, mid, first, parts, False)


def _raised(out: np.ndarray, g: np.ndarray, mid: np.ndarray, first: np.ndarray, parts: list[slice],
            fresh: bool) -> np.ndarray:
    """``out`` over ``parts`` set to (``fresh``) or raised to the second differences."""
    for part in parts:
        second = second_difference(g[part], mid[part], first[part])
        if fresh:
            out[part] = second
        else:
            np.maximum(out[part], second, out=out[part])
    return out


def moved_point(x: np.ndarray, k: int, ulps: float, rng: np.random.Generator,
                grid: np.dtype | None) -> np.ndarray:
    """x + k d in ``x``'s type, d the :func:`jitter_step` that ``rng`` draws, in the step's own
    array: k d is exact there, and the sum rounds once (as the float64 sum cast back did).
    The step is drawn again for every k (the same draws from a fresh generator), so it is
    never held beside the moved point."""
    moved = jitter_step(x, ulps, rng, grid)
    np.multiply(moved, k, out=moved, dtype=moved.dtype)
    moved += x
    return moved


def move_in_place(x: np.ndarray, k: int, ulps: float, rng: np.random.Generator,
                  grid: np.dtype | None) -> None:
    """:func:`moved_point` written into ``x`` itself (C-ordered), SIGN_CHUNK values at a time:
    the same draws in the same order (sampling.random_negative's chunks) and the same
    operations on each value, with no array of ``x``'s size beside it."""
    flat = x.reshape(-1)
    coarser = grid is not None and np.finfo(grid).eps > np.finfo(x.dtype).eps
    for start in range(0, flat.size, SIGN_CHUNK):
        part = flat[start:start + SIGN_CHUNK]
        negative = rng.integers(0, 2, size=part.size) == 0
        step = np.abs(part)
        np.spacing(step, out=step)
        if coarser:
            step = np.maximum(step, np.abs(np.spacing(np.abs(part).astype(grid))).astype(x.dtype))
        step *= ulps
        np.negative(step, out=step, where=negative)
        np.multiply(step, k, out=step, dtype=step.dtype)
        step += part
        part[...] = step


def _refills(x: np.ndarray, other: np.ndarray | None) -> bool:
    """``x`` can be moved in place and put back from ``other``, the same values in an array of
    its own (the float64 run's copy of narrow params, or the narrow params of that run)."""
    return (other is not None and x.flags.c_contiguous and x.flags.writeable and other.shape == x.shape
            and not np.may_share_memory(x, other))


def measured_jitter(backward: Callable[..., Any], grad_output: Any, ws: Workspace, base: dict[str, np.ndarray],
                    seed: int, grid: np.dtype | None = None, compact: bool = False,
                    keep: set[str] | None = None, ulps: float = JITTER_ULPS,
                    source: Workspace | None = None) -> dict[str, np.ndarray]:
    """The largest of |g(x + (k+2)d) - 2 g(x + (k+1)d) + g(x + kd)|, k = 1..JITTER_SPAN-2:
    second differences cancel how the gradient really changes along d and keep how its
    rounding varies from point to point; the points lie on one side of a kink at the
    point, so a kink's jump is not taken for fuzz. JITTER_SPAN backward calls (the run's
    ``seed`` draws the signs). Every tensor of ``base`` moves; only those in ``keep``
    (default: all) are measured. ``source``: a workspace holding ``ws``'s values exactly in
    another type, both at rest: the moved points are written into ``ws``'s own arrays and put
    back from it after each call (no moved copy of the params beside them)."""
    if not base:
        return {}
    names = [name for name in base if keep is None or name in keep]
    in_place = source is not None and source is not ws and all(
        _refills(ws.owners[n], source.owners.get(n)) for n in base)
    fuzz: dict[str, np.ndarray | Narrowed] = {}
    before: list[dict[str, np.ndarray]] = []  # the last two points' gradients only
    absent: set[str] = set()  # tensors some point gave no usable gradient for
    try:
        for k in range(1, JITTER_SPAN + 1):
            # x + k d, one array each (or in place); the steps are drawn again for every point
            raw = _at_moved(backward, grad_output, ws, base, k, ulps, seed, grid, source if in_place else None)
            fresh = isinstance(raw, Handed) and raw.fresh
            # Narrow gradients in their own type (exact), read before the code runs again;
            # the differences in float64, a block at a time.
            g = validate(raw, ws, own_type=True, borrowed=True).values
            del raw
            absent |= {name for name in base if name not in g}
            if len(before) == 2:
                for name in names:
                    if name not in absent:
                        fuzz[name] = largest_second_difference(fuzz.get(name), g[name], before[1][name],
                                                               before[0][name], compact)
            before = before[-1:]  # the oldest is let go of before the newest is kept
            if k < JITTER_SPAN:  # a later difference reads it: a private copy unless fresh
                before.append({n: g[n] if fresh else g[n].copy() for n in names if n in g})
            del g
    except ProbeError:
        return {}
    return {name: v for name, v in fuzz.items() if name not in absent}  # type: ignore[misc]  # compact: Narrowed


def _at_moved(backward: Callable[..., Any], grad_output: Any, ws: Workspace, base: dict[str, np.ndarray],
              k: int, ulps: float, seed: int, grid: np.dtype | None, source: Workspace | None) -> Any:
    """backward's result at x + k d for every tensor of ``base`` (:func:`measured_jitter`)."""
    if source is None:
        moved = {n: moved_point(ws.owners[n], k, ulps, tensor_rng(seed, n, "jitter"), grid) for n in base}
        with quiet():  # a moved point: the code's warnings there are not shown
            return call_backward(backward, ws.replacing(moved), grad_output, scratch=False)
    try:
        for n in base:
            move_in_place(ws.owners[n], k, ulps, tensor_rng(seed, n, "jitter"), grid)
        with quiet():
            return call_backward(backward, ws, grad_output, scratch=False)
    finally:
        for n in base:
            np.copyto(ws.owners[n], source.owners[n], casting="unsafe")
