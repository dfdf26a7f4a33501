"""A failure read off a loss that never changed: does it change at a smaller step?

Float64 code. A coordinate failed on an estimate of exactly 0: the loss did not change at
any step the quotients took (nor at the larger ones :func:`.reconcile.unabsorbed` tries),
against a slope that predicts many roundings at those steps. A loss that ignores the param
never changes however small the step, and that failure stands. Rounding to nearest is
monotone, so code monotone in the coordinate that changes the loss at a step changes it at
every larger step on the same side: a loss that changes at a smaller step, while every step
the quotients took left it as it was, is not monotone within those steps. A pole or a narrow
bump lies closer to the point than them (steep-86812: a term 1/(1 - a (p - k)) 4.9e-9 from
its pole and a tenth of the loss's last place at the point, which steps of 3e-7 and more
jump over), and the quotients say nothing of the slope at the point, whose linear range lies
below any step that shows it above rounding: undecided.

Where to look: a term the steps taken jumped without changing the loss is within its
rounding noise N (a pole's term falls to nothing beyond it), and backward's slope a comes
from a feature that near, so it lies within about a few N / |a| of the point; one a tenth of
the loss's last place high or less moves the loss over a window too narrow for the steps to
find. Steps RATIO-fold smaller, one batch of pairs per level, from the smallest taken (at
most HIGH N / |a|) down to N / (LOW |a|) or a few units of x's resolution, LEVELS at most.
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import is_narrow
from ..common.status import FAIL
from .probe import TensorProbe
from .refine import Taken
from .verdict import Judged

RATIO = 2.0 ** 0.5  # each step this many times smaller than the one above (a window near a pole is narrow)
LEVELS = 48  # levels at most
HIGH, LOW = 8.0, 256.0  # the search spans N / (LOW |a|) to HIGH N / |a| (module's note)

BELOW = (
    "the loss does not change at any step the quotients took, yet does at a smaller one: it is "
    "not smooth on the scale of those steps (a pole or a narrow feature closer to the point), "
    "and no step that rounding allows resolves the slope at the point"
)


def moved_below(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """``judged`` with float64 failures on an estimate of exactly 0, read off pairs that all
    left the loss as it was, undecided where a smaller step changes it (module's note)."""
    if not taken or is_narrow(probe.compute_dtype):
        return judged
    which = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0))
    if which.size == 0:
        return judged
    coords = np.concatenate([c for c, _, _ in taken])
    changed = np.concatenate([(p.f_plus != probe.f0) | (p.f_minus != probe.f0) for _, _, p in taken])
    step = np.concatenate([np.minimum(p.h_plus, p.h_minus) for _, _, p in taken])
    noise = np.concatenate([np.broadcast_to(p.noise, p.f_plus.shape) for _, _, p in taken])
    keep, top, rounding = [], [], []
    for k in which:
        mine = coords == flat[k]
        if mine.any() and not changed[mine].any():
            keep.append(k)
            top.append(float(np.min(step[mine])))
            rounding.append(float(np.max(noise[mine])))
    if not keep:
        return judged
    which = np.array(keep, dtype=np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):
        near = np.array(rounding) / np.abs(probe.a[flat[which]].astype(np.float64))
    top = np.minimum(np.array(top), HIGH * near)
    floor = np.maximum(4.0 * probe.resolution(flat[which]), near / LOW)
    found = np.zeros(which.size, dtype=bool)
    h = top.copy()
    for _ in range(LEVELS):
        h = h / RATIO
        live = np.flatnonzero(~found & (h >= floor))
        if live.size == 0:
            break
        p = probe.pairs(flat[which[live]], h[live])
        found[live] = (p.f_plus != probe.f0) | (p.f_minus != probe.f0)
    where = which[found]
    return judged.undecided(where, (BELOW,) * where.size, noise_limited=False)
