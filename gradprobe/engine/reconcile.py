"""After a coordinate is judged: what float32 code, forward's rounding and backward's own
fuzz change about the verdict.

- float32 code judged on its float64 run (:mod:`.promote`): its float32 gradient must agree
  with that run, unless a kink that float32 rounding puts at the point explains it
  (:func:`float32_side`); otherwise it is checked on the float32 code itself
  (:func:`float32_reconciled`);
- a failure read off a loss that did not change at all is rounding absorbing the step
  (:func:`unabsorbed`);
- a failure backward's own rounding explains is undecided (:func:`unfuzzed`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..status import FAIL, INCONCLUSIVE, KINK
from .ladder import Estimate
from .probe import Pairs, TensorProbe
from .promote import FLOAT32_AGREEMENT, disagreeing
from .verdict import SIGNIFICANCE, Judged

FUZZY = (
    "backward's own rounding varies by as much as the discrepancy between points a few units "
    "in the last place apart: its value is not defined that finely here"
)
BOTH_SIDES = 0.1
ABSORBED = (
    "the loss does not change at all at the steps a decision needs, though it does at larger "
    "ones: rounding in forward absorbs them (sums of much larger terms?)"
)
FLOAT32_STEP = float(np.finfo(np.float32).eps) ** (1.0 / 3.0)  # float32 code's first step


def float32_reconciled(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray,
    error_estimate: np.ndarray, status: np.ndarray, reasons: tuple[str | None, ...],
    scale: np.ndarray, check: Callable[[TensorProbe, np.ndarray], Judged],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, tuple[str | None, ...], np.ndarray]:
    """The verdicts of float32 code judged on its float64 run (``probe.float32`` set), with
    the coordinates whose float32 gradient leaves that run settled: by a kink float32
    rounding puts at the point, or by ``check`` (the coordinate check) on the float32
    code itself, the worse verdict standing. Returns (analytic, numeric, error estimate,
    status, reasons, scale)."""
    own = probe.float32
    assert own is not None
    off = np.flatnonzero(disagreeing(own.a[flat], a, scale))
    status, numeric, error_estimate = status.copy(), numeric.copy(), error_estimate.copy()
    if off.size:  # a kink that float32 rounding puts at the point, on the float64 run?
        sided = float32_side(probe, flat[off], own.a[flat][off], scale[off])
        if sided is not None:
            took, side = sided
            k = off[took]
            status[k] = np.maximum(status[k], KINK)
            numeric[k], error_estimate[k] = side.value, side.error
            a[k] = own.a[flat][k]
            off = off[~took]
    if off.size:  # the float32 value on the float32 code itself
        redo = check(own, flat[off])  # counted with the check's calls
        # The worse verdict stands, with its own reason and numbers.
        worse = redo.status >= status[off]
        status[off] = np.maximum(status[off], redo.status)
        numeric[off[worse]] = redo.estimate.value[worse]
        error_estimate[off[worse]] = redo.estimate.error[worse]
        a[off] = own.a[flat][off]  # report the value the code returns
        redone = {k: r for k, r, w in zip(off.tolist(), redo.reasons, worse) if w}
        reasons = tuple(redone.get(k, r) for k, r in enumerate(reasons))
    scale = probe.denominators(flat, numeric)
    return a, numeric, error_estimate, status, reasons, scale


def unabsorbed(probe: TensorProbe, judged: Judged, first: Pairs) -> Judged:
    """A failure read off a loss that did not change at all (an estimate of exactly 0),
    where the first pair saw it change on both sides alike (the smaller change at least
    BOTH_SIDES of the larger, as slope and curvature give), is rounding in forward absorbing the
    smaller steps (float32 sums of much larger terms), not evidence of a derivative of 0.
    (A loss flat near the point, a unit switched off, changes on one side only: the step
    that reached the kink.)"""
    first_central = first.central
    up, down = np.abs(first.f_plus - probe.f0), np.abs(first.f_minus - probe.f0)
    both = (np.minimum(up, down) >= BOTH_SIDES * np.maximum(up, down)) & (first_central != 0.0)
    absorbed = np.flatnonzero((judged.status == FAIL) & (judged.estimate.value == 0.0) & both)
    if absorbed.size == 0:
        return judged
    undecided = Judged(np.full(absorbed.size, INCONCLUSIVE, dtype=judged.status.dtype),
                       Estimate(first_central[absorbed], np.full(absorbed.size, np.inf)),
                       (ABSORBED,) * absorbed.size, np.ones(absorbed.size, dtype=bool))
    return judged.merged(absorbed, undecided)


def unfuzzed(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray, error: np.ndarray,
    status: np.ndarray, reasons: tuple[str | None, ...],
) -> tuple[np.ndarray, tuple[str | None, ...]]:
    """Failures that the analytic value's own fuzz explains are undecided: where backward's
    rounding varies by the discrepancy's share between points a few units in the last place
    apart (a loss at the rounding level of its own terms), its value is not defined finely
    enough for the discrepancy to be a bug's (see point.Point.jitter)."""
    failing = np.flatnonzero(status == FAIL)
    if failing.size == 0 or probe.jitter is None:
        return status, reasons
    jitter = probe.jitter()
    if jitter is None:
        return status, reasons
    fuzzy = np.abs(a[failing] - numeric[failing]) <= SIGNIFICANCE * (error[failing] + jitter[flat[failing]])
    if not fuzzy.any():
        return status, reasons
    status = status.copy()
    status[failing[fuzzy]] = INCONCLUSIVE
    listed = list(reasons)
    for k in failing[fuzzy].tolist():
        listed[k] = FUZZY
    return status, tuple(listed)


def float32_side(
    probe: TensorProbe, flat: np.ndarray, float32: np.ndarray, scale: np.ndarray
) -> tuple[np.ndarray, Estimate] | None:
    """Which float32 gradients that leave their float64 run are explained by a kink of the
    float64 run within float32's resolution: at one of the steps float32 code would take
    (its first step, and 16 and 256 times smaller) the one-sided quotients of the float64 run
    lie further apart than float32 agreement and than curvature makes them, and the float32
    value lies between them (float32 rounding puts the code on the kink, or on its other
    side, where the float64 run is just off it). With the estimate each is judged by."""
    n = flat.size
    x = np.abs(probe.x[flat].astype(np.float64))
    steps = np.concatenate([FLOAT32_STEP * np.maximum(1.0, x) / 16.0**k for k in range(3)])
    p = probe.pairs(np.tile(flat, 3), steps)
    right, left = (q.reshape(3, n) for q in p.sides(probe.f0))
    noise = (2.0 * p.noise / np.minimum(p.h_plus, p.h_minus)).reshape(3, n)
    tol = FLOAT32_AGREEMENT * scale
    # The gap curvature alone would give at each step, from the smallest step's gap.
    bend = np.abs(right[2] - left[2]) / steps.reshape(3, n)[2]
    curved = 2.0 * bend * steps.reshape(3, n)
    curved[2] = 0.0
    apart = np.abs(right - left) > tol + 2.0 * noise + curved
    between = (float32 >= np.minimum(left, right) - tol - noise) & (float32 <= np.maximum(left, right) + tol + noise)
    fits = apart & between
    took = fits.any(axis=0)
    if not took.any():
        return None
    row = np.argmax(fits, axis=0)  # the largest step that explains it
    cols = np.arange(n)
    lv, rv, nv = left[row, cols], right[row, cols], noise[row, cols]
    nearer = np.where(np.abs(float32 - lv) <= np.abs(float32 - rv), lv, rv)
    return took, Estimate(nearer[took], nv[took])
