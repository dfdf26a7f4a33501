"""A loss flat on both sides of the point: rounding coarser than the steps, or a zone where
the loss does not depend on the param (every unit it feeds switched off)?

A failure read off a loss that did not change at all at the first pair, where larger steps
change it on both sides, is taken as rounding absorbing the smaller steps
(:func:`.reconcile.unabsorbed`): sums of much larger terms, a cast to a narrower type inside.
That rounding has a size. The loss took the same value at x + h and x - h (h the first
step), where the analytic slope ``a`` predicts values 2 |a| h apart: a staircase that absorbs
them has steps of at least |a| h (twice that, less the curvature over so small a step), and
every change the absorbed path makes to the loss is a whole step of it. What other paths of
the loss add on top is finer, but was too small to change the loss at the largest step found
flat on both sides (``flat_to``), so within the 16 times larger step where the loss first
changes it adds at most a few hundred units of the loss's rounding (slope and curvature over
16 and 256 times the step).

A zone that is truly flat ends at a kink (a unit switching on), and past it the loss changes
continuously: bisecting between the last flat step and the first changed one on a side
(ITERATIONS one-sided calls at most), the change just past the boundary shrinks with the
interval and passes every size. A change seen between ZONE_NOISE units of the loss's rounding
and a ZONE_SLACK-th of |a| h fits neither kind of rounding: the loss is flat at every
resolution around the point, its derivative there is 0, and the failure stands.
"""

from __future__ import annotations

import numpy as np

from .probe import TensorProbe

RISE = 16.0  # the first changed step is this many times the last flat one (reconcile.RISE)
ITERATIONS = 40  # one-sided calls per side at most
ZONE_NOISE = 512.0  # changes above this many units of the loss's rounding: not the finer paths
ZONE_SLACK = 4.0  # and below a quarter of the stair absorption would need


def flat_zone(probe: TensorProbe, flat: np.ndarray, h: np.ndarray, flat_to: np.ndarray) -> np.ndarray:
    """Per coordinate ``flat[i]``, left unchanged by the loss at steps up to ``flat_to`` on
    both sides (``h`` the first step among them): a change of the loss between the two
    sizes of the module's note was seen past the edge of that flat zone."""
    n = flat.size
    shown = np.zeros(n, dtype=bool)
    top = np.abs(probe.a[flat].astype(np.float64)) * h / ZONE_SLACK
    bottom = ZONE_NOISE * probe.loss_noise(np.full(n, probe.f0))
    if not np.any(top > bottom):
        return shown
    for sign in (1.0, -1.0):
        lo, hi = flat_to.astype(np.float64).copy(), flat_to * RISE
        step = hi.copy()  # first at the changed step itself, then between
        live = (top > bottom) & ~shown
        for _ in range(ITERATIONS):
            which = np.flatnonzero(live & ~shown)
            if which.size == 0:
                break
            values, _ = probe.one_side(flat[which], step[which], sign)
            change = np.abs(values - probe.f0)
            ok = np.isfinite(values)
            live[which[~ok]] = False
            moved = ok & (change > 0)
            shown[which] |= moved & (change > bottom[which]) & (change < top[which])
            hi[which] = np.where(moved, step[which], hi[which])
            lo[which] = np.where(ok & ~moved, step[which], lo[which])
            live[which[ok & ~moved & (step[which] >= flat_to[which] * RISE)]] = False  # no change there
            step[which] = 0.5 * (lo[which] + hi[which])
    return shown
