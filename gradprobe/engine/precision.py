"""Noticing a forward that computes in a narrower type than the arrays it is handed.

float32 inside float64 arrays: every float64 param is first rounded to float32 (a point
float32 code sees exactly) and then moved by 2**-30 of its size, below half float32's
spacing (2**-25 of a value at least, so float32 rounds it back) but far above float64's
(2**-53). Float64 code sees the move; float32 code gives a bitwise identical loss. So does
float64 code whose loss cancels along that even move (an odd function of params placed
symmetrically about 0, a scale-invariant loss): a float32 verdict also needs the loss
unchanged by a move of random signs and sizes up to 2**-30. A third call with a move of
2**-12 confirms that the loss depends on the params at all, and how large the float64 change
would have been. Where the loss hardly changes along the even move (a norm layer is
scale-invariant), the same two looks are taken along a move of random signs and sizes. Where
the params' moves show nothing (a softmax's bias at 0, which no move in proportion to its
size can shift), the floating inputs are moved with them.

float16 or bfloat16 inside float64 or float32 arrays (a cast to a 16-bit type around the
arithmetic): every param is rounded to bfloat16, a point on the grid of both 16-bit types
(bfloat16's values carry 8 significant bits, float16's 11), then moved by 2**-18 of its
size, up and down, and by up to that much with random signs and sizes (a loss that cancels
along the even moves sees those): 16-bit code gives a bitwise identical loss where float32 code changes it
by tens of its units (values computed from the params before the cast cross a 16-bit
rounding boundary at such a move once in about 2**10); so must moves of 2**-16 (float32 code
whose values carry an offset, a * (p - k) with |k| about 100 |p|, rounds 2**-18 away but not
2**-16). Moves up and down of 2**-4 and 2**-7 (which every 16-bit type resolves) confirm that
the loss depends on the params: half the difference of a pair's losses is the change's
first-order part (a loss at its minimum changes by the move's square alike both ways), scaled
down to the largest move the loss ignored (2**-16 or 2**-18, or 2**-12 where float64 params
rounded to float32 ignored it) it must be two units of float32's at least. The wider pair's part counts
where the losses lie on a 16-bit grid (16-bit code returning its loss in its own type), or
where it is within 4 times the nearer pair's; else the nearer pair's: a kink crossed by 2**-4
(or a bend between the moves) makes the wider pair's change no measure of the slope at the
point. A loss unchanged on a side of the nearer pair is flat there (a relu off at the point,
in float32 code as much as in 16-bit code): no evidence. float16 rather than
bfloat16 needs positive evidence: the loss values seen lie on float16's grid and not all on
bfloat16's (code that returns its loss rounded to float16; a loss that barely depends on the
params ignores every move below), or the loss ignores four moves of 0.875 * 2**-12 in random
directions (below float16's resolution) and sees one of 2**-10 (a unit of float16's, below
bfloat16's). Otherwise the coarser type is concluded (bfloat16 code whose params pass
through float32 arithmetic before the cast can see a move of 2**-10), which judges code
more leniently than its arithmetic, never more strictly.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from ..common.errors import BadOutputError, UserCodeError
from ..common.tensors import Workspace, is_float
from .evaluate import Perturbation
from .evaluator import Evaluator

SMALL = 2.0**-30  # below half float32's spacing (2**-25 of a value at least): it rounds back
LARGE = 2.0**-12
TINY = 2.0**-18  # far below the 16-bit types' resolution, tens of units of float32's
SIXTEEN_LARGE = 2.0**-4  # a move every 16-bit type resolves, up and down
SIXTEEN_NEAR = 2.0**-7  # a move every 16-bit type resolves (one unit of bfloat16's at least)
AGREE = 4.0  # the wider pair's first-order part is trusted up to this many times the nearer's
SIXTEEN_LIVE = 2.0  # float32 code changes by this many of its units at TINY at least
WIDER_TINY = 2.0**-16  # still below the 16-bit types' resolution: float32 code whose values carry
# an offset (a * (p - k), |k| about 100 |p|) drops a move of TINY but sees this one
SUB_UNIT = 0.875 * 2.0**-12  # below float16's resolution (half a unit: 2**-12 to 2**-11)
SUB_UNIT_TRIES = 4
HALF_UNIT = 2.0**-10  # below bfloat16's resolution, a unit of float16's
ACROSS = 2  # the seed of the random signs of a move across the even one (see _sixteen_bits)
LIVE = 64.0  # the change a move would make in the finer type, in units of its eps times |f|


@dataclass(frozen=True)
class HiddenType:
    dtype: np.dtype
    evidence: str


def _bfloat16() -> np.dtype | None:
    try:
        import ml_dtypes
    except ImportError:  # an optional extra: without it bfloat16 is not told from float16
        return None
    return np.dtype(ml_dtypes.bfloat16)


CHUNK = 1 << 16  # elements moved at a time (even: random signs drawn a chunk at a time are
# the same stream as one draw for the whole tensor)


def _moved(ws: Workspace, names: list[str], relative: float, grid: np.dtype,
           signs: np.random.Generator | None = None, in_place: bool = False,
           spread: bool = False) -> list[Perturbation]:
    """Every tensor of ``names`` rounded to ``grid`` and moved by ``relative`` of its size (with
    random signs if ``signs``, and random sizes from half of it to all of it if ``spread``), in
    the tensor's own dtype, a chunk at a time: one array of the
    tensor's size each, or none with ``in_place`` (written into the workspace's own copies,
    which the caller puts back, see :func:`_restored`)."""
    out = []
    for name in names:
        owner = ws.owners[name]
        flat = owner.reshape(-1)
        moved = flat if in_place else np.empty_like(flat)
        for lo in range(0, flat.size, CHUNK):
            part = _on_grid(flat[lo:lo + CHUNK], grid)
            if signs is None:
                part *= 1.0 + relative
            else:
                step = relative * signs.choice([-1.0, 1.0], size=part.size)
                if spread:
                    step *= signs.uniform(0.5, 1.0, size=part.size)
                part *= 1.0 + step
            moved[lo:lo + CHUNK] = part
        out.append(Perturbation(name, slice(0, owner.size), moved))
    return out


def _on_grid(values: np.ndarray, grid: np.dtype) -> np.ndarray:
    """``values`` rounded to ``grid``, in float64; a value beyond the grid's range stays as it
    is (code in that type cannot hold it, so it says nothing either way), without a warning."""
    with np.errstate(over="ignore", invalid="ignore"):
        rounded = values.astype(grid).astype(np.float64)
    lost = ~np.isfinite(rounded) & np.isfinite(values)
    if lost.any():
        rounded[lost] = values[lost]
    return rounded


class _Looks:
    """The loss with every tensor moved as :func:`_moved` says; with ``source`` (a workspace
    whose copies equal these exactly once widened: the narrow code's own, for its float64
    run), the moves are written into this workspace's copies and put back from ``source``
    after each call (no moved copy of the params exists)."""

    def __init__(self, evaluator: Evaluator, ws: Workspace, names: list[str],
                 source: Workspace | None) -> None:
        self.evaluator, self.ws, self.names, self.source = evaluator, ws, names, source
        self.seen: list[float] = []  # every loss value the looks gave

    def loss(self, relative: float, grid: np.dtype, signs: np.random.Generator | None = None,
             spread: bool = False) -> float:
        in_place = self.source is not None
        try:
            value = self.evaluator.loss_with(_moved(self.ws, self.names, relative, grid, signs, in_place, spread))
        finally:
            if in_place:
                self._restore()
        self.seen.append(float(value))
        return value

    def _restore(self) -> None:
        assert self.source is not None
        for name in self.names:
            flat, back = self.ws.owners[name].reshape(-1), self.source.owners[name].reshape(-1)
            for lo in range(0, flat.size, CHUNK):
                flat[lo:lo + CHUNK] = back[lo:lo + CHUNK]


def narrower_compute_type(
    evaluator: Evaluator, ws: Workspace, f0: float, out_dtype: np.dtype,
    source: Workspace | None = None,
) -> HiddenType | None:
    """The narrower type a float64 or float32 forward demonstrably computes in, else None
    (2 to 20 calls). ``source``: a workspace holding ``ws``'s values exactly in a narrower
    type (the moves are then made in place and put back from it, see :class:`_Looks`)."""
    out_dtype = np.dtype(out_dtype)
    if out_dtype not in (np.dtype(np.float64), np.dtype(np.float32)):
        return None
    params = [n for n in ws.param_names if ws.owners[n].dtype == out_dtype and ws.owners[n].any()]
    inputs = [n for n in ws.names() if n not in ws.param_names and is_float(ws.owners[n])
              and ws.owners[n].dtype == out_dtype and ws.owners[n].any()]
    if not params and not inputs:
        return None
    found: HiddenType | None = None
    unchanged = TINY  # the largest move known to leave the loss bitwise unchanged
    looks = _Looks(evaluator, ws, params, source)
    try:
        if out_dtype == np.float64:
            seen = _float32_inside(looks, f0) if params else SILENT
            if seen == SILENT and inputs:
                # The params' moves hardly change the loss (a softmax is shift-invariant in a
                # scalar param): the same looks with the floating inputs moved too.
                seen = _float32_inside(_Looks(evaluator, ws, params + inputs, source), f0)
            if seen in (WIDER_SEEN, SILENT):
                return None  # float64 code, or no evidence either way
            if isinstance(seen, HiddenType):
                found = seen
            else:
                unchanged = LARGE  # wider code would see 2**-12 of a loss that changes at all
        if not params:
            return found  # the 16-bit looks move params alone (inputs may enter outside a kernel)
        return _sixteen_bits(looks, f0, out_dtype, unchanged) or found
    except (UserCodeError, BadOutputError):
        return found  # the moved points are outside forward's domain: no more evidence


WIDER_SEEN, SILENT, UNMOVED = "wider", "silent", "unmoved"  # what the float32 looks showed


def _float32_inside(looks: _Looks, f0: float) -> HiddenType | str:
    """Float32 arithmetic inside float64 arrays, by moves of the looks' tensors rounded to
    float32 (2 to 5 calls): the type found, WIDER_SEEN (float64 code), SILENT (no move
    changes the loss enough to tell) or UNMOVED (nor at all: a loss that changes would
    have shown a move of 2**-12)."""
    rounded = looks.loss(0.0, np.dtype(np.float32))
    if looks.loss(SMALL, np.dtype(np.float32)) != rounded:
        return WIDER_SEEN
    live = LIVE * np.finfo(np.float64).eps * max(abs(rounded), abs(f0))
    moved = looks.loss(LARGE, np.dtype(np.float32))
    if abs(moved - rounded) * (SMALL / LARGE) > live:
        if looks.loss(SMALL, np.dtype(np.float32), np.random.default_rng(1), spread=True) != rounded:
            return WIDER_SEEN  # the loss cancels along the even move (odd in params symmetric
            # about 0, or scale-invariant): float64 code sees a move of random signs and sizes
        return HiddenType(np.dtype(np.float32), " although its params are float64 (moving every param "
                          "by 2**-30 of its size left the loss bitwise unchanged)")
    # The loss hardly changes along the even move (scale-invariant code: a norm layer): the
    # same look along a move of random signs and sizes.
    spread = looks.loss(LARGE, np.dtype(np.float32), np.random.default_rng(2), spread=True)
    if abs(spread - rounded) * (SMALL / LARGE) > live:
        if looks.loss(SMALL, np.dtype(np.float32), np.random.default_rng(2), spread=True) != rounded:
            return WIDER_SEEN
        return HiddenType(np.dtype(np.float32), " although its params are float64 (moving every param "
                          "by 2**-30 of its size, with random signs, left the loss bitwise unchanged)")
    return SILENT if moved != rounded else UNMOVED  # 2**-12 seen though too small to tell: no evidence


def _on_a_grid(values: list[float], grid: np.dtype) -> bool:
    """The losses are themselves values of ``grid`` or of float16 (16-bit code that returns its
    loss in its own type), the first nonzero and two distinct at least: a float32 loss lies on
    bfloat16's grid by chance once in 2**16, float16's once in 2**13 (a loss of 0, as where
    every relu is off, lies on every grid)."""
    seen = np.asarray(values, np.float64)
    if seen[0] == 0 or len(set(seen.tolist())) < 2:
        return False
    kinds = [grid] if grid == np.float16 else [grid, np.dtype(np.float16)]
    with np.errstate(over="ignore"):
        return any(bool(np.all(seen.astype(kind).astype(np.float64) == seen)) for kind in kinds)


def on_a_sixteen_bit_grid(values: list[float]) -> bool:
    """:func:`_on_a_grid` for bfloat16 (and float16), or float16 alone without ml_dtypes;
    at least three distinct finite values (a float64 loss with few bits lands on float16's
    grid more often than by chance, rarely three times over)."""
    finite = [v for v in values if np.isfinite(v)]
    if len(set(finite)) < 3 or len(finite) < len(values):
        return False
    return _on_a_grid(finite, _bfloat16() or np.dtype(np.float16))


def _finer_than(values: list[float], grid: np.dtype) -> bool:
    """The losses lie on float16's grid, at least three distinct and finite, and one at least
    not on ``grid`` (bfloat16's, whose 8 significant bits float16's 11 hold): code that
    rounds its loss to float16 last, not bfloat16 code (a float32 value lies on float16's grid
    by chance once in 2**13)."""
    seen = np.asarray([v for v in values if np.isfinite(v)], np.float64)
    if seen.size < len(values) or len(set(seen.tolist())) < 3:
        return False
    with np.errstate(over="ignore"):
        half = seen.astype(np.float16).astype(np.float64)
        coarse = seen.astype(grid).astype(np.float64)
    return bool(np.all(half == seen) and np.any(coarse != seen))


def _first_order(looks: _Looks, grid: np.dtype, rounded: float, seed: int | None = None) -> float | None:
    """The first-order part of the loss's change at a move of ``SIXTEEN_LARGE`` (which every
    16-bit type resolves), from half the difference of the losses at moves up and down (a loss
    at its minimum changes by the move's square alike both ways): of ``SIXTEEN_LARGE``'s where
    the losses lie on a 16-bit grid (:func:`_on_a_grid`) or agree with those of
    ``SIXTEEN_NEAR``'s within ``AGREE`` (16-bit rounding makes the nearer pair's noisy), else of
    ``SIXTEEN_NEAR``'s scaled up; None where a side of the nearer pair is unchanged (a loss
    flat at the point changes on one side only, where a kink is crossed). A kink or a bend
    between the two moves makes the wider pair's change no measure of the slope at the point.
    With ``seed``: along moves of random signs drawn from it (the same direction up and down)."""
    def loss(move: float) -> float:
        return looks.loss(move, grid, None if seed is None else np.random.default_rng(seed))

    far = [loss(move) for move in (SIXTEEN_LARGE, -SIXTEEN_LARGE)]
    near = [loss(move) for move in (SIXTEEN_NEAR, -SIXTEEN_NEAR)]
    wide = 0.5 * abs(far[0] - far[1])
    if _on_a_grid([rounded, *far, *near], grid):
        return wide
    if rounded in near:  # unchanged on a side that 16-bit code resolves: flat there
        return None
    close = 0.5 * abs(near[0] - near[1]) * (SIXTEEN_LARGE / SIXTEEN_NEAR)
    return wide if wide <= AGREE * close else close


def _sixteen_bits(looks: _Looks, f0: float, out_dtype: np.dtype, unchanged: float = TINY) -> HiddenType | None:
    """float16 or bfloat16 when the loss ignores moves below their resolution (see the
    module's docstring), else None. ``unchanged``: the largest move known to leave the loss
    bitwise unchanged (2**-12 of float64 params rounded to float32, else TINY); the loss's
    first-order change scaled down to it must be two units of float32's at least."""
    grid = _bfloat16() or np.dtype(np.float16)
    rounded = looks.loss(0.0, grid)
    for tiny in (TINY, -TINY):  # float32 code sees both
        if looks.loss(tiny, grid) != rounded:
            return None
    def live(linear: float | None) -> bool:
        return linear is not None and linear * (max(unchanged, TINY) / SIXTEEN_LARGE) > \
            SIXTEEN_LIVE * np.finfo(np.float32).eps * max(abs(rounded), abs(f0))

    # Moves of WIDER_TINY (float32 code with offsets sees them; below 16-bit resolution) left
    # the loss unchanged too: the first-order change is scaled down to them, four times TINY's
    # (a loss whose slope along the moves is small, near its minimum, still shows float32's
    # units there: inside16-1200851, bfloat16 inside float32 arrays, once taken for float32).
    wider_unchanged = all(looks.loss(wider, grid) == rounded for wider in (WIDER_TINY, -WIDER_TINY))
    if wider_unchanged:
        unchanged = max(unchanged, WIDER_TINY)
    if not live(_first_order(looks, grid, rounded)):
        # A loss near its minimum along the even move (every param scaled alike) barely changes
        # along it: the evidence is then read along a move of random signs, which float32 code
        # must see at TINY too (both ways, the same direction).
        for tiny in (TINY, -TINY):
            if looks.loss(tiny, grid, np.random.default_rng(ACROSS)) != rounded:
                return None
        if not live(_first_order(looks, grid, rounded, ACROSS)):
            return None
    if not wider_unchanged:  # float32 code whose values carry offsets sees these
        return None
    if looks.loss(TINY, grid, np.random.default_rng(1), spread=True) != rounded:
        return None  # float32 code whose loss cancels along the even moves sees random signs and sizes
    said = f" although its params are {out_dtype} (moving every param by 2**-18 of its size left the loss bitwise unchanged"
    half = HiddenType(np.dtype(np.float16), said + ")")
    if grid == np.float16:
        return half
    if _finer_than(looks.seen, grid):
        return HiddenType(np.dtype(np.float16), said + "; its values lie on float16's grid, finer than bfloat16's)")
    rng = np.random.default_rng(0)  # fixed signs: the look is the same on every run
    for _ in range(SUB_UNIT_TRIES):  # below float16's resolution: float16 code ignores each
        if looks.loss(SUB_UNIT, grid, rng) != rounded:
            return HiddenType(grid, said + "; float16 and bfloat16 could not be told apart, and the "
                                           "coarser is taken)")
    for signs in (None, rng):  # a unit of float16's: float16 code sees it
        if looks.loss(HALF_UNIT, grid, signs) != rounded:
            return half
    return HiddenType(grid, said + ", and so did moves of 2**-10, below bfloat16's resolution)")
