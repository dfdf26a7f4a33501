"""Whether a ladder's rows lie in the loss's Taylor range: a failure stands only where they do.

Every estimate a ladder gives (the central tableau, a side's, the sides' mean) takes the loss
as its Taylor series over the steps. There the larger of a pair's two one-sided moves is
|f'| h + |f''| h**2 / 2 + ..., which grows at least in proportion to the step, and rounding
moves it by two loss values' rounding at most. Rows whose moves stay the same size as the
step grows 8- to 64-fold were taken beyond the loss's smooth scale (a sine far finer than the
steps, whose quotients are its amplitude over the step), or on a loss whose rounding is not
what their bounds took: the estimate's agreement among them says nothing of the slope at the
point (:func:`unscaled_moves`; :mod:`.grounds` applies it to every ladder judged, and
:mod:`.steep_noise` to its chain on the rounding measured along a coordinate).
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import is_narrow
from ..common.status import FAIL
from .probe import TensorProbe
from .refine import RATIO, Ladder
from .verdict import UNSETTLED, Judged

UNSCALED_SPAN = 8.0  # rows this many times the smallest step or wider ...
UNSCALED_GROWTH = 2.0  # ... moving the loss by at most twice the smallest row's move: not its Taylor range


def unscaled_moves(probe: TensorProbe, flat: np.ndarray, ladder: Ladder, judged: Judged) -> Judged:
    """``judged`` with failures undecided (UNSETTLED, so a retry goes to smaller steps) where
    the ladder's rows moved the loss beyond two values' rounding somewhere, yet no row at
    least UNSCALED_SPAN times the smallest step moved it by more than UNSCALED_GROWTH times
    the smallest row's move (or than two roundings, where that is larger): the coordinate
    moves the loss by more than rounding can, and by no more at wider steps
    (:func:`moves_unscaled`). steep-73003: sines of period 3e-6 to 4e-6 beneath steps of
    1.2e-4 to 7.6e-6 moved a loss of 7.9e29 by about 1e16 at every step; the sides' mean read
    8.5e19 +- 2.1e21 against a true -1.85e22 and failed a correct gradient. steep-89576: a
    sine of amplitude 1.5 roundings beneath steps of 6.1e-5 to 3.8e-6, moves of 1 to 2.3
    roundings at every step, read 5e6 +- 2.4e7 against a true 1.98e8."""
    if is_narrow(probe.compute_dtype) or ladder.pairs is None:
        return judged
    which = np.flatnonzero(judged.status == FAIL)
    n, p = flat.size, ladder.pairs
    rows = p.f_plus.size // n
    if which.size == 0 or RATIO ** (rows - 1) < UNSCALED_SPAN:
        return judged
    with np.errstate(invalid="ignore", over="ignore"):
        moved = np.maximum(np.abs(p.f_plus - probe.f0), np.abs(probe.f0 - p.f_minus)).reshape(rows, n)[:, which]
    noise = np.broadcast_to(p.noise, p.f_plus.shape).reshape(rows, n)[:, which]
    h = np.maximum(p.h_plus, p.h_minus).reshape(rows, n)[:, which]
    held = moves_unscaled(moved, noise, h)
    k = which[held]
    return judged.undecided(k, (UNSETTLED,) * k.size, noise_limited=False)


def moves_unscaled(moved: np.ndarray, noise: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Per column of rows of pairs (rows, coordinates; NaN rows not taken): some row's larger
    one-sided move ``moved`` lies beyond two values' rounding (``noise``, one value's), and
    every row at least UNSCALED_SPAN times the smallest step ``h`` moved the loss by at most
    UNSCALED_GROWTH times the smallest row's move or two roundings, the larger (there is one
    such row at least). In the Taylor range a move m at the smallest step gives at least
    8 (m - 2 e) - 2 e eight times wider: beyond twice m from m = 4.5 e up. Below that, a
    slope whose moves stay within four roundings at every step is what the rows could still
    be: the withheld failures are those whose loss moves by more than rounding can, and by no
    more at steps 8 to 64 times wider, where a bug resolved by the loss would move it in
    proportion."""
    with np.errstate(invalid="ignore", over="ignore"):
        taken = np.isfinite(moved) & np.isfinite(h)
        h = np.where(taken, h, np.inf)
        low = np.argmin(h, axis=0)
        cols = np.arange(h.shape[1])
        smallest, step, rounding = moved[low, cols], h[low, cols], noise[low, cols]
        wide = taken & (h >= UNSCALED_SPAN * step * (1 - 1e-9))
        reach = UNSCALED_GROWTH * np.maximum(smallest, 2.0 * rounding)
        held = np.all(np.where(wide, moved <= reach, True), axis=0)
        seen = np.any(taken & (moved > 2.0 * rounding), axis=0)
        return held & wide.any(axis=0) & seen


__all__ = ["moves_unscaled", "unscaled_moves"]
