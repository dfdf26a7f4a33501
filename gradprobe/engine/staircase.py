"""A failure read off a flat loss where a 16-bit cast inside, not found, would explain it.

The look for a narrower type inside (:mod:`.precision`) finds 16-bit arithmetic only where
the loss moves clearly at moves of 2**-4; code whose loss barely moves there is judged in its
arrays' type. Judged as float32 (see :func:`_judged_as_float32`), a coordinate whose loss
did not change at all at the steps tried (an estimate of exactly 0) was failed as if the
code resolved those steps;
yet code that casts to bfloat16 inside ignores every move below bfloat16's spacing at the
param (8 significant bits) and every change of the loss below bfloat16's resolution of it.

Such a failure stands only where one pair of calls at a step that bfloat16 arithmetic, the
coarsest there is, must resolve shows the loss unchanged on both sides: a step of at least
SPACINGS of bfloat16's spacings at the param, at which the analytic gradient predicts a change
of at least UNITS of bfloat16's units of the loss (of max(|f|, the loss scale measured)).
A smooth loss with that slope changes there on one side at least (the two one-sided changes
are a h + c h**2 and -a h + c h**2; both within half a unit needs |a h| within one), so
a loss unchanged on both sides contradicts the gradient whatever the arithmetic inside.
Where the loss changes at that step on both sides alike (the smaller change a tenth of the
larger at least, as slope and curvature give; a change on one side only is a flat side
beside a kink, or a slope the loss does not have), or the step lies beyond the params' own scale, the
coordinate is undecided (the reasons below), never failed on arithmetic it may not have.
Where that step reaches beyond the params' scale, the grain the loss shows along the
coordinate out to it (:mod:`.seen_grain`), where finer than bfloat16's unit, sets the step.

Code judged as float64 whose loss is flat at every step tried and at a far smaller one too
(:func:`flat_below_the_steps`) keeps its failure unless the loss shows a staircase far
coarser than float64's rounding (:func:`coarse_treads`): a 16-bit cast the look did not find
(moving every param by 2**-4 of its size can leave such a loss nearly unchanged).
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL
from .precision import on_a_sixteen_bit_grid
from .probe import TensorProbe
from .seen_grain import seen_grain
from .verdict import Judged

BFLOAT16_BITS = 8  # significant bits of bfloat16, the coarsest 16-bit type
SPACINGS = 4.0  # the step spans this many of bfloat16's spacings at the param
UNITS = 4.0  # and the predicted change this many of bfloat16's units of the loss
BOTH_SIDES = 0.1  # the loss changes on both sides alike: the smaller change this share of the larger

COARSER = (
    "the loss does not change at all at the steps tried, and a step at which arithmetic as "
    "coarse as bfloat16 inside would show this gradient reaches beyond the params' own scale: "
    "a gradient this small is not told from 0 here"
)
CHANGES = (
    "the loss does not change at all at the steps a decision needs, though it does at a step "
    "that arithmetic as coarse as bfloat16 inside resolves: rounding inside absorbs the smaller "
    "ones (a cast to a 16-bit type the look for one did not find?)"
)


def _judged_as_float32(probe: TensorProbe) -> bool:
    """float32 code judged on its own arithmetic. (Code judged as float64 is left as it was:
    a loss flat at float64's steps is far more often one that does not depend on the param,
    the bug this failure names, than a 16-bit cast the look did not find.)"""
    return probe.narrow is None and probe.compute_dtype == np.dtype(np.float32)


def bfloat16_step(probe: TensorProbe, flat: np.ndarray, units: bool = True) -> np.ndarray:
    """The step at which bfloat16 arithmetic must show the analytic gradient (see above);
    ``units`` False: SPACINGS of bfloat16's spacings at the param alone."""
    x = np.abs(probe.x[flat].astype(np.float64))
    with np.errstate(divide="ignore"):
        spacing = np.where(x > 0, 2.0 ** (np.floor(np.log2(np.where(x > 0, x, 1.0))) - (BFLOAT16_BITS - 1)), 0.0)
        unit = 2.0 ** -(BFLOAT16_BITS - 1) * probe.loss_scale
        needed = UNITS * unit / np.abs(probe.a[flat]) if units else 0.0
    return np.maximum(SPACINGS * spacing, needed)


FLOAT64_UNITS = 8.0  # float64: the smaller step's predicted change in units of the loss
MOVED_UNITS = 2.0  # and each side's change at it beyond this many units: not rounding

CLOSER = (
    "the loss does not change at all at the steps tried, yet changes on both sides at a far "
    "smaller step, where this gradient predicts a change of a few units of its rounding: a "
    "pole or kink closer than the steps tried, and a gradient this steep is not resolved there"
)


def flat_below_the_steps(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """Float64 code: a failure read off a loss that did not change at all at any step tried
    (an estimate of exactly 0) stands only where the loss is flat at a far smaller step too,
    one at which the analytic gradient predicts a change of FLOAT64_UNITS units of the loss.
    A loss that does not depend on the param (the bug the failure names) is flat there as
    well. A loss flat at the steps tried that moves on both sides alike (the smaller change a
    tenth of the larger at least, each beyond MOVED_UNITS units) at the far smaller step is not
    smooth between them (a smooth loss changes more at a larger step, not less): a pole or
    kink lies closer than the steps, and the coordinate is undecided."""
    zero = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0))
    if zero.size == 0:
        return judged
    unit = float(np.finfo(np.float64).eps) * probe.loss_scale
    with np.errstate(divide="ignore", over="ignore"):
        h = FLOAT64_UNITS * unit / np.abs(probe.a[flat[zero]].astype(np.float64))
    usable = np.isfinite(h) & (h > 0)
    if not usable.any():
        return judged
    inside = np.flatnonzero(usable)
    p = probe.pairs(flat[zero[inside]], h[inside])
    up, down = np.abs(p.f_plus - probe.f0), np.abs(p.f_minus - probe.f0)
    moved = ((np.minimum(up, down) >= BOTH_SIDES * np.maximum(up, down))
             & (np.minimum(up, down) > MOVED_UNITS * unit))
    which = inside[moved]
    if which.size == 0:
        return judged
    return judged.undecided(zero[which], (CLOSER,) * which.size)


TREADS = 8  # points on each side, evenly out to the bfloat16 step: a staircase shows a tread
COARSE = 2.0**-23  # a tread this far from the loss at the point (relative): beyond float32's unit
GRAIN_POINTS = 12  # points on each side along the analytic gradient, at steps shrinking by
GRAIN_RATIO = 0.7  # this ratio (no power of two: a smooth loss's changes are no multiples)
GRAIN_INTEGER = 1e-6  # how near an integer multiple of the grain each change lies (relative)
GRAINS = 4.0  # a coordinate whose predicted change stays below this many grains can look flat

STAIRCASE = (
    "the loss does not change at all at the steps tried, nor at a far smaller one, yet it moves "
    "as a staircase far coarser than float64's rounding (whole steps of one grain, or the same "
    "value at neighbouring points away from the point), whose grain can hide this gradient "
    "(a cast to a 16-bit type inside that the look for one did not find?)"
)


def _grain(probe: TensorProbe) -> float:
    """The grain of a coarse staircase the loss shows along the analytic gradient, 0 where
    none shows: at GRAIN_POINTS steps on each side (the params' own scale times powers of
    GRAIN_RATIO) the loss's changes from its value at the point take three distinct sizes at
    least, every one an integer multiple of the smallest, and that far above float64's
    rounding (COARSE of the loss's size). A smooth loss's changes at such steps (a t + c t**2
    at t in ratios of 0.7) are no multiples of each other; a loss rounded to a coarse grid
    last changes by whole steps of it."""
    a = np.asarray(probe.a[:], dtype=np.float64).reshape(-1)  # an array or a Widened one
    norm = float(np.linalg.norm(a))
    if not np.isfinite(norm) or norm == 0.0:
        return 0.0
    d = a / norm
    top = probe.x_scale / float(np.max(np.abs(d)))
    t = top * GRAIN_RATIO ** np.arange(GRAIN_POINTS, dtype=np.float64)
    values, _ = probe.along(slice(0, probe.size), d, np.concatenate([t, -t]))
    change = np.abs(np.asarray(values, dtype=np.float64) - probe.f0)
    sizes = np.unique(change[np.isfinite(change) & (change > 0)])
    if sizes.size < 3 or sizes[0] <= COARSE * max(abs(probe.f0), probe.loss_scale):
        return 0.0
    q = sizes / sizes[0]
    return float(sizes[0]) if np.all(np.abs(q - np.round(q)) <= GRAIN_INTEGER * q) else 0.0


FINE = 2.0**-12  # a change below half a float16 unit of the loss: no 16-bit rounding made it


def _fine_change(v: np.ndarray, below: float) -> np.ndarray:
    """Per row of losses ``v``: two of its finite values differ, by less than ``below``."""
    s = np.sort(np.where(np.isfinite(v), v, np.nan), axis=1)
    d = np.diff(s, axis=1)
    with np.errstate(invalid="ignore"):
        return np.any((d > 0) & (d < below), axis=1)


def coarse_treads(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """Float64 code: a failure read off a loss that did not change at all, which
    :func:`flat_below_the_steps` left standing, stands only where the loss shows no tread of
    a coarse staircase: at TREADS points on each side, evenly out to :func:`bfloat16_step`
    (within the params' own scale), two neighbours with the same value, which differs from
    the loss at the point by more than COARSE of the loss's size. A smooth float64 loss flat
    at the steps tried moves at most a few of its units there, and once it moves clearly it
    takes a new value at every point; a loss that does not depend on the param (the bug the
    failure names) stays flat throughout, and a flat side beside a kink (a unit switched off)
    moves smoothly past it. A tread says rounding far coarser than float64's inside hides
    the smaller steps, so the float64 bound the failure was read with does not hold: the
    coordinate is undecided. So is one whose predicted change out there, |a| times the step,
    stays below GRAINS grains of a staircase the loss shows along the analytic gradient
    (:func:`_grain`): its flatness is what the staircase's grain allows."""
    zero = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0))
    if zero.size == 0:
        return judged
    scale = np.maximum(np.abs(probe.x[flat[zero]].astype(np.float64)), probe.x_scale)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        h = np.minimum(bfloat16_step(probe, flat[zero]), scale)
    usable = np.flatnonzero(np.isfinite(h) & (h > 0))
    if usable.size == 0:
        return judged
    k = np.arange(1, TREADS + 1, dtype=np.float64)
    where = np.repeat(flat[zero[usable]], TREADS)
    p = probe.pairs(where, (h[usable][:, None] * k[None, :] / TREADS).reshape(-1))
    size = COARSE * max(abs(probe.f0), probe.loss_scale)
    tread = np.zeros(usable.size, dtype=bool)
    fine = np.zeros(usable.size, dtype=bool)
    for side in (p.f_plus, p.f_minus):
        v = side.reshape(usable.size, TREADS)
        same = (v[:, 1:] == v[:, :-1]) & (np.abs(v[:, 1:] - probe.f0) > size)
        tread |= same.any(axis=1)
        fine |= _fine_change(v, FINE * max(abs(probe.f0), probe.loss_scale))
        # Every loss seen on a 16-bit grid (a float64 loss lands on one by chance once in
        # 2**13 values at most): the loss is rounded to 16 bits, its treads hidden by curvature.
        tread |= np.array([on_a_sixteen_bit_grid([probe.f0, *row]) for row in v.tolist()], dtype=bool)
    if not tread.all():
        grain = _grain(probe)
        if grain > 0:
            tread |= np.abs(probe.a[flat[zero[usable]]].astype(np.float64)) * h[usable] < GRAINS * grain
    # A change far finer than a 16-bit type's unit among them: the loss is not rounded to
    # one (the plateaus are the loss's own, units switched on or off further out).
    tread &= ~fine
    which = usable[tread]
    if which.size == 0:
        return judged
    return judged.undecided(zero[which], (STAIRCASE,) * which.size)


def flat_through_sixteen_bits(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """``judged`` with its failures read off a loss that did not change at all kept only where
    a pair at :func:`bfloat16_step` does not change the loss on both sides alike (a flat side
    beside a kink changes on one side only). Float64 code: :func:`flat_below_the_steps`, then
    :func:`coarse_treads`."""
    if probe.narrow is None and probe.compute_dtype == np.dtype(np.float64):
        return coarse_treads(probe, flat, flat_below_the_steps(probe, flat, judged))
    if not _judged_as_float32(probe):
        return judged
    zero = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0))
    if zero.size == 0:
        return judged
    h = bfloat16_step(probe, flat[zero])
    scale = np.maximum(np.abs(probe.x[flat[zero]].astype(np.float64)), probe.x_scale)
    beyond = ~(h <= scale)
    if beyond.any():  # the grain the loss shows along the coordinate, where finer (seen_grain.py)
        far = np.flatnonzero(beyond)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            finer = UNITS * seen_grain(probe, flat[zero[far]], scale[far]) / np.abs(probe.a[flat[zero[far]]])
        h[far] = np.where(finer < h[far], np.maximum(finer, bfloat16_step(probe, flat[zero[far]], units=False)), h[far])
        beyond = ~(h <= scale)
    reasons = {}
    inside = np.flatnonzero(~beyond)
    if inside.size:
        p = probe.pairs(flat[zero[inside]], h[inside])
        up, down = np.abs(p.f_plus - probe.f0), np.abs(p.f_minus - probe.f0)
        moved = (np.minimum(up, down) >= BOTH_SIDES * np.maximum(up, down)) & (np.maximum(up, down) > 0)
        for k in inside[moved].tolist():
            reasons[k] = CHANGES
    for k in np.flatnonzero(beyond).tolist():
        reasons[k] = COARSER
    if not reasons:
        return judged
    which = np.array(sorted(reasons))
    return judged.undecided(zero[which], tuple(reasons[k] for k in which.tolist()))
