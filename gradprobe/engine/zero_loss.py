"""A failure read off a loss that is exactly 0 at the point and at every step taken.

The rounding of a loss value is taken as a few units of eps |f|: at a loss of exactly 0 that
is no rounding at all, so an estimate of exactly 0 gets a bound of 0 and any analytic value
but 0 fails. Yet a loss computed as 0 can stand for terms that rounding absorbed: a
saturated cross-entropy, log(1 + 1e-40), is exactly 0 while its derivative is 1e-41
(property case kink-near-55001: every gradient of a saturated network ~1e-41, every tensor
failed). The assumption behind the bound of 0 is checked here, on the coordinate:

Steps RISE-fold larger than the first guess, up to BEYOND times the params' own scale (one
batch of pairs; a saturated unit may need a move larger than the param to wake), find where the loss first leaves 0, and the values it takes there: their rounding,
UNITS units of eps |f|, is the least the loss's rounding can be near them. A slope a moves
the loss by |a| h over the largest step h that left it at 0; where that is below the
rounding of the values where it first moves, its absence says nothing about a, and the
failure is undecided. Where it is above (a backward that gives a unit switched off a
slope: the loss is 0 on one side up to the unit's threshold, then grows by about its true
slope, far above rounding), or where the loss never leaves 0 over those steps (a loss
that ignores the param), the failure stands.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL
from .probe import TensorProbe
from .verdict import Judged

RISE = 4.0  # each step this many times the one below
LEVELS = 40  # steps at most above the first guess
BEYOND = 64.0  # the largest step: this many times the params' own scale
UNITS = 4.0  # rounding units of eps |f| at the values where the loss first moves

ZERO_LOSS = (
    "the loss is exactly 0 at the point and at every step up to where it first moves, and the "
    "change the analytic value predicts over those steps is below the rounding of the loss "
    "where it does: terms absorbed by rounding (a saturated log or softmax?), nothing resolved"
)


def zero_loss(probe: TensorProbe, flat: np.ndarray, judged: Judged) -> Judged:
    """``judged`` with failures on an estimate of exactly 0 of a loss exactly 0 undecided
    where the slope they claim is below the loss's rounding where it first moves (module's
    note)."""
    if probe.f0 != 0.0:
        return judged
    which = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0))
    if which.size == 0:
        return judged
    first = probe.prior_steps(flat[which])
    scale = BEYOND * np.maximum(np.abs(probe.x[flat[which]].astype(np.float64)), probe.x_scale)
    levels = int(np.clip(np.ceil(np.log(np.max(scale / first)) / np.log(RISE)), 0, LEVELS - 1)) + 1
    steps = first[None, :] * RISE ** np.arange(levels)[:, None]
    within = steps <= np.maximum(scale, first)[None, :]
    rows, cols = np.nonzero(within)
    p = probe.pairs(flat[which[cols]], steps[rows, cols])
    size = np.zeros(steps.shape)
    size[rows, cols] = np.maximum(np.abs(p.f_plus), np.abs(p.f_minus))
    moved = size > 0
    if not np.isfinite(size).all():
        moved &= np.isfinite(size)
    level = np.argmax(moved, axis=0)  # the first step that moves the loss
    ever = moved.any(axis=0) & (level > 0)  # it stays 0 at the first guess and moves later
    k = np.arange(which.size)
    unmoved_to = steps[np.maximum(level - 1, 0), k]
    rounding = UNITS * probe.rounding_units * probe.eps * size[level, k]
    predicted = np.abs(probe.a[flat[which]].astype(np.float64)) * unmoved_to
    where = which[ever & (predicted <= rounding)]
    return judged.undecided(where, (ZERO_LOSS,) * where.size)
