"""After a coordinate is judged: what narrow code, forward's rounding and backward's own
fuzz change about the verdict.

- narrow code (float32, float16, ...) judged on its float64 run (:mod:`.promote`): its
  narrow gradient must agree with that run to the type's threshold or to its measured
  rounding, unless a kink that narrow rounding puts at the point explains it
  (:func:`.narrow.kink_within_reach`); otherwise it is checked on the narrow code itself
  (:func:`narrow_reconciled`);
- a failure read off a loss that did not change at all is rounding absorbing the step
  (:func:`unabsorbed`);
- a gradient exactly zero throughout, passed only on the target's floor, fails where the
  numeric values are resolved and beyond the threshold at the tensor's own scale
  (:func:`zero_at_own_scale`);
- a failure backward's own rounding explains is undecided (:func:`unfuzzed`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..common.roundoff import is_narrow
from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from .ladder import Estimate
from .probe import FLOOR_FRACTION, Pairs, TensorProbe
from .widened import root_mean_square
from .narrow import kink_within_reach
from .promote import disagreeing
from .flat_zone import flat_zone
from .sixteen import coarse
from .verdict import NOISE, SIGNIFICANCE, Judged

FUZZY = (
    "backward's own rounding varies by as much as the discrepancy between points a few units "
    "in the last place apart: its value is not defined that finely here"
)
BOTH_SIDES = 0.1
BEYOND_ROUNDING = (
    "its {dtype} gradient leaves the float64 run by more than the type's threshold and several "
    "times the rounding measured for it, and the {dtype} arithmetic cannot resolve its own "
    "derivative here to explain it"
)
ABSORBED = (
    "the loss does not change at all at the steps a decision needs, though it does at larger "
    "ones: rounding in forward absorbs them (sums of much larger terms, or a cast to a narrower type "
    "inside?)"
)
STAIRS = (
    "the loss does not change at all at any step tried, up to 64 times the params' scale, while "
    "along other elements of the tensor it moves only in stairs taller than the change this "
    "gradient predicts there: its rounding hides the slope (a loss at the rounding level of its "
    "own terms, residuals within a unit of their targets?)"
)


def narrow_reconciled(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray,
    error_estimate: np.ndarray, status: np.ndarray, reasons: tuple[str | None, ...],
    scale: np.ndarray, check: Callable[[TensorProbe, np.ndarray], Judged],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, tuple[str | None, ...], np.ndarray]:
    """The verdicts of narrow code judged on its float64 run (``probe.narrow`` set), with the
    coordinates whose narrow gradient leaves that run by more than the narrow type's
    threshold settled: by a kink narrow rounding puts at the point
    (:func:`.narrow.kink_within_reach`); else, beyond SIGNIFICANCE times the rounding
    measured for it (point.Point.narrow_spread) too, or off the sides of a kink the float64
    run shows within reach (that kink's jump, not rounding, is then what the narrow backward
    varies by between nearby points: bug-sign-61003), by ``check`` (the coordinate check) on
    the narrow code itself, against that rounding, the worse verdict standing. 16-bit
    gradients are compared with that run relative to the tensor's typical gradient at least
    (a 16-bit backward rounds at u times the terms it combines), and where the 16-bit
    arithmetic cannot tell (rounding noise at every step), one beyond SIGNIFICANCE times its
    measured rounding fails on the float64 run, the numeric reference; elsewhere such a
    coordinate is undecided. Returns (analytic, numeric, error estimate, status, reasons,
    scale)."""
    own = probe.narrow
    assert own is not None
    narrow_a = own.a[flat]
    # A 16-bit backward rounds at u times the terms it combines, as large as the tensor's
    # typical gradient where one element's is far smaller (1 - t*t near saturation): its
    # gradient is compared with the float64 run's at that scale at least, as the 16-bit
    # arithmetic judges it (point.Point.probe).
    allowed = own.threshold * (np.maximum(scale, own.floor) if coarse(own) else scale)
    off = np.flatnonzero(disagreeing(narrow_a, a, allowed))
    status, numeric, error_estimate = status.copy(), numeric.copy(), error_estimate.copy()
    beside = np.zeros(0, dtype=np.int64)
    if off.size:  # a kink that narrow rounding puts at the point, on the float64 run?
        sided = kink_within_reach(probe, own, flat[off], narrow_a[off], scale[off])
        if sided is not None:
            took, side, off_sides = sided
            k = off[took]
            status[k] = np.maximum(status[k], KINK)
            numeric[k], error_estimate[k] = side.value, side.error
            a[k] = narrow_a[k]
            beside = off[off_sides]
            off = off[~took]
    spread = own.jitter() if off.size and own.jitter is not None else None
    if spread is not None:  # beyond the type's threshold: beyond its measured rounding too?
        # Not where a kink is shown with the narrow value off its sides: the narrow backward's
        # variation between points a few units apart is then that kink's jump, not rounding.
        off = off[(np.abs(narrow_a[off] - a[off]) > SIGNIFICANCE * spread[flat[off]]) | np.isin(off, beside)]
    if off.size:  # the narrow value on the narrow code itself
        redo = check(own, flat[off])  # counted with the check's calls
        redone_status, redone_reasons = unfuzzed(own, flat[off], narrow_a[off], redo.estimate.value,
                                                 redo.estimate.error, redo.status, redo.reasons)
        # 16 bits: where the narrow arithmetic cannot resolve its own derivative (rounding
        # noise at every step) while the narrow gradient leaves the float64 run, the numeric
        # reference, by more than the type's threshold at the tensor's typical gradient and
        # SIGNIFICANCE times the rounding measured for it, that run decides: a failure, with
        # the run's numbers. (float32's elements are compared each at its own scale, where
        # rounding that the measure at nearby points misses can exceed the threshold on a
        # correct backward: property cases f32-scalar-71007, bug-factor-71055; undecided.)
        silent = np.zeros(off.size, dtype=bool)
        if spread is not None and coarse(own):
            noise = np.array([(r or "").startswith(NOISE) for r in redone_reasons], dtype=bool)
            silent = (redone_status == INCONCLUSIVE) & noise & (
                np.abs(narrow_a[off] - a[off]) > SIGNIFICANCE * spread[flat[off]])
            redone_status = np.where(silent, FAIL, redone_status)
        # The worse verdict stands, with its own reason and numbers.
        worse = (redone_status >= status[off]) & ~silent
        status[off] = np.maximum(status[off], redone_status)
        numeric[off[worse]] = redo.estimate.value[worse]
        error_estimate[off[worse]] = redo.estimate.error[worse]
        a[off] = narrow_a[off]  # report the value the code returns
        redone = {k: r for k, r, w in zip(off.tolist(), redone_reasons, worse) if w}
        redone.update({k: BEYOND_ROUNDING.format(dtype=own.compute_dtype.name)
                       for k in off[silent].tolist()})
        reasons = tuple(redone.get(k, r) for k, r in enumerate(reasons))
    scale = probe.denominators(flat, numeric)
    return a, numeric, error_estimate, status, reasons, scale


def unabsorbed(probe: TensorProbe, flat: np.ndarray, judged: Judged, first: Pairs) -> Judged:
    """A failure read off a loss that did not change at all (an estimate of exactly 0),
    where the first pair saw it change on both sides alike (the smaller change at least
    BOTH_SIDES of the larger, as slope and curvature give), is rounding in forward absorbing the
    smaller steps (float32 sums of much larger terms), not evidence of a derivative of 0.
    Where not even the first pair changed it, a larger step must (:func:`_changes_through`),
    on either side, where no change past the edge of the unchanged zone is smaller than a
    staircase's stairs (:func:`.flat_zone.flat_zone`): code that rounds to a type narrower
    than its arrays inside (a cast to bfloat16), or a loss at the rounding level of its own
    terms (residuals within a unit of their targets: a float64 loss of 2e-38 that moves in
    stairs as tall as itself, 1e14 times eps |f|), is a staircase far coarser than the
    arrays' steps. (A loss flat near the point, a unit switched off, changes past the kink
    continuously, as the bisection there shows; a loss that does not depend on the param
    never changes.) A coordinate that never changed, up to BEYOND times the params' scale,
    is undecided too where stairs are shown on others of the tensor and the smallest of them
    is above the change its analytic slope predicts over the widest step tried (the stairs
    would hide it; property case bug-derivative-61017: tensors the bug left unchanged failed on
    0 +- 2e-47)."""
    first_central = first.central
    up, down = np.abs(first.f_plus - probe.f0), np.abs(first.f_minus - probe.f0)
    both = (np.minimum(up, down) >= BOTH_SIDES * np.maximum(up, down)) & (first_central != 0.0)
    zero_fail = (judged.status == FAIL) & (judged.estimate.value == 0.0)
    still = np.flatnonzero(zero_fail & (up == 0.0) & (down == 0.0))
    hid: set[int] = set()
    if still.size:  # not even the first pair changed the loss: does a larger step?
        h = 0.5 * (first.h_plus[still] + first.h_minus[still])
        changes, flat_to, stair, tried = _changes_through(probe, flat[still], h)
        # ... and is the loss's rounding that coarse, or a zone flat at every resolution?
        stairs = changes & ~flat_zone(probe, flat[still], h, flat_to)
        both[still] = stairs
        if stairs.any():  # unmoved at every step tried, yet the stairs shown would hide its slope?
            hidden = ~changes & (np.abs(probe.a[flat[still]].astype(np.float64)) * tried < np.min(stair[stairs]))
            both[still[hidden]] = True
            hid = set(still[hidden].tolist())
    absorbed = np.flatnonzero(zero_fail & both)
    if absorbed.size == 0:
        return judged
    said = tuple(STAIRS if k in hid else ABSORBED for k in absorbed.tolist())
    undecided = Judged(np.full(absorbed.size, INCONCLUSIVE, dtype=judged.status.dtype),
                       Estimate(first_central[absorbed], np.full(absorbed.size, np.inf)),
                       said, np.ones(absorbed.size, dtype=bool))
    return judged.merged(absorbed, undecided)


RISE = 16.0  # the larger steps tried: 16, 256, ... times the first
RISES = 6
BEYOND = 64.0  # the widest step: this many times the params' own scale (stairs can be wider)


def _changes_through(probe: TensorProbe, flat: np.ndarray, h: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per coordinate: at some step h * RISE**k (k = 1..RISES, never beyond BEYOND times the
    params' own scale; for narrow code, within that scale and on both sides alike, as before)
    the loss changes, on either side: the smaller steps were absorbed, or
    the loss is flat up to a kink (a unit switched off), which :func:`.flat_zone.flat_zone`
    tells apart where it can (a zone flat on both sides, a soft threshold, is undecided too,
    never a pass). One batch of pairs. Also, per coordinate, the largest step tried at which
    the loss changed on neither side (``h`` where every step changed it), the smallest change
    at the first step that changed it (inf where none did) and the widest step tried."""
    scale = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    factors = RISE ** np.arange(1, RISES + 1)
    steps = h[None, :] * factors[:, None]
    wide = probe.compute_dtype == np.dtype(np.float64)  # narrow code: its own steps, both sides alike
    within = steps <= np.maximum((BEYOND if wide else 1.0) * scale, h)[None, :]
    levels = int(within.any(axis=1).sum())
    if levels == 0:
        return np.zeros(flat.size, dtype=bool), h, np.full(flat.size, np.inf), h
    p = probe.pairs(np.tile(flat, levels), steps[:levels].reshape(-1))
    up = (p.f_plus - probe.f0).reshape(levels, flat.size)
    down = (probe.f0 - p.f_minus).reshape(levels, flat.size)
    unchanged = (up == 0.0) & (down == 0.0) & within[:levels]
    first_change = np.argmax(~unchanged, axis=0)  # levels below it all left the loss as it was
    flat_to = np.where(first_change > 0, steps[np.maximum(first_change - 1, 0), np.arange(flat.size)], h)
    with np.errstate(invalid="ignore"):
        moved = ((np.abs(up) > 0) | (np.abs(down) > 0)) & within[:levels]
        if not wide:  # a change on both sides alike (a unit switched off changes one side only)
            moved &= np.minimum(np.abs(up), np.abs(down)) >= BOTH_SIDES * np.maximum(np.abs(up), np.abs(down))
        sizes = np.where(np.abs(up) > 0, np.abs(up), np.inf), np.where(np.abs(down) > 0, np.abs(down), np.inf)
    k = np.arange(flat.size)
    stair = np.where(moved.any(axis=0), np.minimum(*sizes)[first_change, k], np.inf)
    tried = np.max(np.where(within[:levels], steps[:levels], h[None, :]), axis=0)
    return moved.any(axis=0), flat_to, stair, tried


def own_code_reconciled(
    own: TensorProbe, flat: np.ndarray, numeric: np.ndarray, error_estimate: np.ndarray,
    status: np.ndarray, reasons: tuple[str | None, ...], scale: np.ndarray,
    check: Callable[[TensorProbe, np.ndarray], Judged],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, tuple[str | None, ...], np.ndarray]:
    """Narrow code whose backward returns its narrow type whatever it is given, judged
    against numeric derivatives of its forward's float64 run: a coordinate failing there is
    checked by ``check`` on the narrow code itself, and where that check passes it (or finds
    a consistent kink) its verdict and numbers stand instead (the narrow forward has the
    slope its narrow gradient gives: a saturated tanh, an underflow, a branch taken only in
    the narrow type, as the narrow backward computes it). A failure the narrow code cannot
    settle stays a failure. Returns (numeric, error estimate, status, reasons, scale)."""
    failing = np.flatnonzero(status == FAIL)
    if failing.size == 0:
        return numeric, error_estimate, status, reasons, scale
    redo = check(own, flat[failing])  # counted with the check's calls
    took = np.flatnonzero((redo.status == PASS) | (redo.status == KINK))
    if took.size == 0:
        return numeric, error_estimate, status, reasons, scale
    k = failing[took]
    numeric, error_estimate, status, scale = numeric.copy(), error_estimate.copy(), status.copy(), scale.copy()
    numeric[k], error_estimate[k] = redo.estimate.value[took], redo.estimate.error[took]
    status[k] = redo.status[took]
    scale[k] = own.denominators(flat[k], numeric[k])
    listed = list(reasons)
    for j, r in zip(k.tolist(), took.tolist()):
        listed[j] = redo.reasons[r]
    return numeric, error_estimate, status, tuple(listed), scale


def unfuzzed(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray, error: np.ndarray,
    status: np.ndarray, reasons: tuple[str | None, ...],
) -> tuple[np.ndarray, tuple[str | None, ...]]:
    """Failures that the analytic value's own fuzz explains are undecided: where backward's
    rounding varies by the discrepancy's share between points a few units in the last place
    apart (a loss at the rounding level of its own terms), its value is not defined finely
    enough for the discrepancy to be a bug's (see point.Point.jitter). 16-bit code judged on
    its own arithmetic: between points a few units of its own grid apart, at least
    (point.Point.coarse_jitter; moves finer than its grid leave a 16-bit backward unchanged,
    and a term of the loss that varies within a few of its units, a ripple below the loss's
    rounding, adds to backward's value what no quotient shows, yet shows there)."""
    failing = np.flatnonzero(status == FAIL)
    if failing.size == 0 or probe.jitter is None:
        return status, reasons
    jitter = probe.jitter()
    own = probe.own_rounding() if coarse(probe) and probe.own_rounding is not None else None
    if jitter is None and own is None:
        return status, reasons
    off = np.abs(a[failing] - numeric[failing])
    fine = 0.0 if jitter is None else jitter[flat[failing]]
    # The coarse grid's variation is taken once, as where a 16-bit coordinate passes or fails
    # on its jittered estimate (sixteen_verdicts.measured_passes): it is a largest change already.
    fuzzy = off <= SIGNIFICANCE * (error[failing] + fine) + (0.0 if own is None else own[flat[failing]])
    if not fuzzy.any():
        return status, reasons
    status = status.copy()
    status[failing[fuzzy]] = INCONCLUSIVE
    listed = list(reasons)
    for k in failing[fuzzy].tolist():
        listed[k] = FUZZY
    return status, tuple(listed)


def zero_at_own_scale(probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray,
                 error: np.ndarray, status: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A gradient that is exactly zero at every checked coordinate, passed only on the target's
    floor (1e-4 of its largest tensor's gradient scale), fails where the numeric value is
    resolved (beyond SIGNIFICANCE error bounds) and beyond the threshold at the tensor's own
    numeric scale (FLOOR_FRACTION of its rms): the floor is there for a zero gradient against
    a numeric value that is rounding, not against a derivative of another size (a whole
    gradient left out beside a tensor 1e10 times larger, near a pole, passed on it). Nonzero
    analytic values keep the floor (their own rounding can reflect the other tensors' terms).
    float64 numerics only; :func:`unfuzzed` then undecides what backward's rounding explains.
    Returns the statuses and the scales (those of the coordinates failed so, their own)."""
    passing = np.flatnonzero(status == PASS)
    if passing.size == 0 or is_narrow(probe.compute_dtype) or probe.narrow is not None or np.any(a):
        return status, scale
    own = max(probe.tensor_floor, FLOOR_FRACTION * root_mean_square(np.asarray(numeric, dtype=np.float64)))
    if own >= probe.floor:
        return status, scale
    err = np.abs(a[passing] - numeric[passing])
    mine = np.maximum(np.maximum(np.abs(a[passing]), np.abs(numeric[passing])), own)
    beyond = (err > probe.threshold * mine) & (err > SIGNIFICANCE * error[passing])
    if not beyond.any():
        return status, scale
    status, scale = status.copy(), scale.copy()
    status[passing[beyond]] = FAIL
    scale[passing[beyond]] = mine[beyond]
    return status, scale
