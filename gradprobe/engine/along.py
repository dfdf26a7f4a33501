"""A 16-bit tensor judged as a whole where its coordinates stay undecided: the loss's slope
along a few directions at wide steps against the analytic gradient's projection.

Code computing in bfloat16 or float16 (often cast inside float32 or float64 arrays) has a
loss that is a staircase of steps about u |L|: one coordinate's quotient needs steps so wide
that curvature then hides all but gross errors. Along a unit direction d over the whole
tensor the slope is g . d, which collects every element's share (along the analytic gradient
itself |a| rather than one |a_i|). The discrepancy (g - a) . d is estimated as a coordinate's
is on wide steps (:func:`.wide_steps.windowed`: Richardson windows whose error model is checked
on the quotients, or :func:`.wide_steps.plain_windowed` without extrapolation) from the loss at
x +- t d for steps t, 2t, 4t, ... up to the params' own scale, the analytic change a . m of
the moves m the forward really sees subtracted (so the rounding of x +- t d to the type's
grid cancels). The loss's rounding is measured on the direction itself, at the point and at
both widest steps (:func:`_rounding`), never below the spacing of the loss values seen (a
loss rounded to 16 bits last takes only values that far apart). A direction whose one-sided
slopes stay apart as the step halves crosses a kink and says nothing; so does one whose gap,
on its line through the steps about the widest step the estimate takes, misses 0 by more
than its rounding (:func:`_jump_shown`: a kink within that step). A kink next to the point
keeps the gap near its jump at every step, each step within its own rounding: the steps
jointly show it (:func:`_joint_jump`), and the direction allows that jump as a coordinate does.

Where the discrepancy exceeds SIGNIFICANCE of its bound (a coordinate's margin: the bound is
a coordinate's wide-step bound, checked on the quotients the same way) plus any jointly
shown kink's jump, and also the most that elements each within the threshold could add
along d (thr / (1 - thr) * sum max(|a_i|, floor) |d_i|) and the shares of a . d that elements
moved far past their own size (:func:`.own_size.moved_beyond_own_size`) and elements whose
loss moves as across a jump at every step (:mod:`.steady_difference`) carry, which the
loss's slope there may miss, some element is wrong beyond the threshold for certain: the
tensor fails, though which element may stay undecided. A discrepancy that the quotients
below the window jointly put within BORNE_UNITS of their rounding of 0 is no evidence
(:func:`_borne_out_below`). A direction never passes a tensor (errors of several elements
may cancel along it).
Directions: the analytic gradient, the coordinates' own numeric estimates' departure from
it, and one at random; the first that fails ends it.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from ..common.classes import dataclass
from ..common.roundoff import is_narrow, unit_roundoff
from ..common.status import FAIL, INCONCLUSIVE
from ..report.model import DirectionResult
from .coordinates import CoordinateOutcome
from .ladder import Estimate
from .own_size import moved_beyond_own_size
from .steady_difference import jumping
from .wide_steps import WIDE_NOISE, plain_windowed_at, windowed_at
from .probe import TensorProbe
from .widened import as_seen
from .along_gaps import ROUNDING_SPREADS, joint_jump, jump_shown
from .sides_gap import does_not_halve
from .sampling import tensor_rng
from .verdict import SIGNIFICANCE

STEPS = 10  # steps t, 2t, ..., 512t: the largest moves the params by their own scale
SKEW_SAFETY = 2.0  # the asymmetry of the rounded moves is taken twice
CLEAN = 0.25  # moves whose rounding to the grid leaves them this asymmetric at most
NOISE_SPAN = 10  # the loss's rounding: eleven points along the direction, nine second differences
SECOND_VARIANCE = 6.0  # a second difference of independent roundings of spread s spreads by sqrt(6) s
NOISE_UNITS = 4.0  # a typical element moves by this many units of the type's grid between them
MOVED_SCALES = 2.0  # the widest move: at most this many times the rms of the elements moved
BORNE_UNITS = 2.0  # the steps below a window show its discrepancy beyond this many of their joint rounding


@dataclass(frozen=True)
class Along:
    """The directions tried, and why the tensor fails (None: no direction showed it)."""

    results: tuple[DirectionResult, ...]
    fails: str | None
    evaluations: int


def wanted(probe: TensorProbe, outcome: CoordinateOutcome) -> bool:
    """The tensor is judged on its own 16-bit arithmetic and some coordinate stayed
    undecided while none failed."""
    coarse = is_narrow(probe.compute_dtype) and unit_roundoff(probe.compute_dtype) >= unit_roundoff(np.float16)
    return (coarse and probe.narrow is None and probe.size > 0
            and bool(np.any(outcome.status == INCONCLUSIVE)) and not np.any(outcome.status == FAIL))


def _directions(probe: TensorProbe, outcome: CoordinateOutcome, seed: int) -> Iterator[tuple[str, np.ndarray]]:
    """The directions, one at a time (each an array of the tensor's size)."""
    a = probe.a
    assert isinstance(a, np.ndarray)  # a tensor judged on its own arithmetic: its own gradient
    norm_a = float(np.linalg.norm(a))
    if norm_a > 0:
        yield "along the analytic gradient", a / norm_a
    off = np.zeros(probe.size)
    finite = np.isfinite(outcome.numeric)
    off[outcome.flat[finite]] = outcome.numeric[finite] - a[outcome.flat[finite]]
    norm = float(np.linalg.norm(off))
    if norm > 0 and (norm_a == 0 or abs(float(off @ a)) < 0.99 * norm * norm_a):
        yield "along the coordinates' numeric estimates less the gradient", off / norm
    del off
    if probe.size > 1:
        g = tensor_rng(seed, probe.tensor, "along").standard_normal(probe.size)
        yield "along a random direction", g / np.linalg.norm(g)


@dataclass(frozen=True)
class _Seen:
    """One direction at every step: the discrepancy's estimate, the analytic slope, and the
    most that elements within the threshold could add along the moves."""

    estimate_value: float
    estimate_error: float
    analytic: float
    allowed: float
    kink: float = 0.0  # the largest jump a kink the steps jointly show could have (0: none shown)
    far: np.ndarray | None = None  # elements the window's steps move far past their own size
    borne: bool = True  # the steps below the window show a discrepancy too (else it is no evidence)


def _rounding(probe: TensorProbe, d: np.ndarray, at: float) -> tuple[float, float, np.ndarray] | None:
    """The rounding of one loss value near x + at d, seen directly, relative to the loss's
    size there: the loss at NOISE_SPAN + 1 points x + at d + k w, w a move along d of whole
    pairs of each element's grid units (about NOISE_UNITS of them), less the analytic change
    of the moves. Moves of whole grid units are exact (within a binade), so the moved
    distances are k times one vector: how the loss really changes is then linear in k, and
    so is the part an error in the analytic gradient leaves (with moves rounded unevenly to
    the grid, that part showed as rounding, and the larger the error the larger the rounding
    it seemed to measure). Second differences cancel both and keep how its rounding varies
    (SPREAD_MARGIN times the largest; see noise.measured_rounding). With that size and the
    values; None where the loss did not change at all, or its second differences are all
    0, or no element moves a whole pair of units: that says nothing of its rounding."""
    x = probe.x
    with np.errstate(over="ignore", invalid="ignore"):
        there = as_seen((x + at * d).astype(x.dtype), probe.compute_dtype)
    grid = np.abs(np.spacing(np.abs(there).astype(probe.compute_dtype))).astype(np.float64)
    typical = float(np.sqrt(np.mean(d * d)))
    delta = NOISE_UNITS * float(np.sqrt(np.mean(grid * grid))) / max(typical, 1e-300)
    pair = 2.0 * grid  # a multiple of the grid on either side of a binade's edge
    whole = np.round(delta * d / pair) * pair
    if not np.all(np.isfinite(whole)) or not np.any(whole):
        return None
    seen = [probe.along(slice(0, probe.size), at * d + k * whole, np.ones(1)) for k in range(NOISE_SPAN + 1)]
    values = np.array([v[0] for v, _ in seen], dtype=np.float64)
    predicted = np.array([p[0] for _, p in seen], dtype=np.float64)
    second = np.diff(values - predicted, n=2)
    if not np.all(np.isfinite(second)) or not np.any(second) or np.all(values == values[0]):
        return None
    spread = float(np.sqrt(np.mean(second * second) / SECOND_VARIANCE))
    return ROUNDING_SPREADS * spread, float(np.max(np.abs(values))), values


def _granularity(values: np.ndarray) -> float:
    """The smallest nonzero distance between the loss values seen: a loss rounded to a coarse
    type last (a float16 sum returned as float32) takes only values this far apart, and
    moves too small to cross one show no rounding at all."""
    distinct = np.unique(values[np.isfinite(values)])
    steps = np.diff(distinct)
    return float(steps.min()) if steps.size else 0.0


def _measure(probe: TensorProbe, d: np.ndarray) -> _Seen | None:
    x = probe.x
    span = max(float(np.max(np.abs(d))), 1e-300)
    # No element moves beyond the params' own scale, nor beyond MOVED_SCALES times the
    # scale of the elements the direction moves (their rms weighted by d; a sixteenth of
    # the params' scale at least, for elements at 0): a few large params must not carry
    # small ones, where most of the slope lies, far past where the loss levels off (a bump,
    # a saturating unit: the loss's change goes flat while the analytic change keeps
    # growing, and the quotients settle on -a.d as if converged).
    moved = float(np.sqrt(np.sum((d * x.astype(np.float64)) ** 2) / max(float(np.sum(d * d)), 1e-300)))
    top = min(probe.x_scale, max(MOVED_SCALES * moved, probe.x_scale / 16.0)) / span
    if not np.isfinite(top) or top <= 0:
        return None
    steps = top * 2.0 ** -np.arange(STEPS - 1, -1, -1.0)  # ascending
    values, predicted = probe.along(slice(0, probe.size), d, np.stack([steps, -steps], axis=1).reshape(-1))
    f_plus, f_minus = values[0::2], values[1::2]
    p_plus, p_minus = predicted[0::2], -predicted[1::2]
    if not (np.all(np.isfinite(f_plus)) and np.all(np.isfinite(f_minus))):
        return None
    base = as_seen(x, probe.compute_dtype)
    assert isinstance(probe.a, np.ndarray)  # as in _directions
    weight = np.maximum(np.abs(probe.a), probe.floor)
    asymmetry, allowed = np.zeros(STEPS), np.zeros(STEPS)
    for k, t in enumerate(steps):
        with np.errstate(over="ignore", invalid="ignore"):  # past the type's range: not finite
            m_plus = as_seen((x + t * d).astype(x.dtype), probe.compute_dtype) - base
            m_minus = base - as_seen((x - t * d).astype(x.dtype), probe.compute_dtype)
        both = m_plus + m_minus
        asymmetry[k] = float(np.linalg.norm(m_plus - m_minus)) / max(float(np.linalg.norm(both)), 1e-300)
        allowed[k] = float(weight @ np.abs(both)) / (2.0 * t)
    # What elements within the threshold could add along the moves really made, at the steps
    # the rounding to the grid leaves nearly as asked (the others' quotients carry it as noise).
    clean = asymmetry <= CLEAN
    most = float(allowed[clean].max()) if clean.any() else float(allowed.max())
    asymmetry = SKEW_SAFETY * asymmetry
    size = np.maximum(np.abs(f_plus), np.abs(f_minus))
    seen = [_rounding(probe, d, at) for at in (0.0, -float(steps[-1]), float(steps[-1]))]
    if all(r is not None for r in seen):  # measured at the point and at the widest steps
        at_point, below, above = (r for r in seen if r is not None)
        # The rounding is set by the sizes of the terms summed, not by the sum's: a point
        # where the loss is small (terms cancelling) shows the same absolute rounding as the
        # others, and taken relative to its loss it would inflate the rest tenfold. So on
        # each side the larger rounding seen, absolute, at the point or at that side's widest
        # step (the terms at the steps between lie between theirs); growing with the loss
        # beyond the largest loss measured, at that point's share of it.
        largest = max((at_point, below, above), key=lambda r: r[1])
        share = largest[0] / max(largest[1], 1e-300)
        every = np.concatenate([values, [probe.f0], *(r[2] for r in (at_point, below, above))])
        grain = _granularity(every)
        point_noise = max(at_point[0], share * abs(probe.f0), grain)
        plus_noise, minus_noise = (
            np.maximum(np.maximum(max(at_point[0], side[0]), share * np.maximum(np.abs(f), abs(probe.f0))), grain)
            for side, f in ((above, f_plus), (below, f_minus)))
        noise = 0.5 * (plus_noise + minus_noise)  # a central quotient's: (n+ + n-) / (2 t)
        gap_noise = (plus_noise + minus_noise + 2.0 * point_noise) / steps  # right - left's
        own_noise = (plus_noise + minus_noise) / steps  # without the point's, shared by every step
    else:  # no measure: the probe's model of the type's rounding
        noise = probe.loss_noise(f_plus, f_minus)
        gap_noise = 2.0 * noise / steps
        own_noise = gap_noise
    central = (f_plus - f_minus - p_plus - p_minus) / (2.0 * steps)
    right = (f_plus - probe.f0 - p_plus) / steps
    left = (probe.f0 - f_minus - p_minus) / steps
    if does_not_halve(np.abs(right - left), 2.0 * WIDE_NOISE * gap_noise):
        return None  # a kink along the direction: its slopes say nothing of the gradient
    column = lambda v: np.asarray(v, dtype=np.float64).reshape(STEPS, 1)  # noqa: E731
    rows = (column(central), column(steps), column(noise / steps), column(right - left),
            column(gap_noise), column(asymmetry), np.array([top]))
    (plain, plain_top), (extrapolated, extrapolated_top) = plain_windowed_at(*rows), windowed_at(*rows)
    better = bool(extrapolated.error[0] < plain.error[0])
    est = extrapolated if better else plain
    top_row = int((extrapolated_top if better else plain_top)[0])
    if jump_shown(right - left, gap_noise, steps, top_row):
        return None  # a kink within the steps the estimate takes: they say nothing of the gradient
    kink = joint_jump(right - left, own_noise, steps, top_row)
    first = max(top_row - 1, 0)  # the window's smallest step
    far = moved_beyond_own_size(probe, d, float(steps[first]))
    borne = _borne_out_below(central[:first], (noise / steps)[:first])
    return _Seen(float(est.value[0]), float(est.error[0]), float(probe.a @ d), most, kink, far, borne)


def _borne_out_below(central: np.ndarray, rounding: np.ndarray) -> bool:
    """Whether the quotients at the steps below the estimate's window, ``central`` with their
    ``rounding``, show a discrepancy too: their mean weighted by 1/rounding**2 lies beyond
    BORNE_UNITS of its own rounding from 0 (true where there are none). A discrepancy only the
    window's wide steps show, while the steps nearer the point jointly put it at 0, is a slope
    that changes between them (ReLU corners crossed one after another as the steps grow:
    quotients 0.0005, 0.048, 0.110, 0.128, 0.142, inside16-3300556), not the derivative here."""
    seen = np.isfinite(central) & np.isfinite(rounding) & (rounding > 0)
    if not seen.any():
        return True
    weight = 1.0 / rounding[seen] ** 2
    mean = float(np.sum(weight * central[seen]) / np.sum(weight))
    return abs(mean) >= BORNE_UNITS * float(1.0 / np.sqrt(np.sum(weight)))


def _share(probe: TensorProbe, d: np.ndarray, which: np.ndarray) -> float:
    """The share of the analytic slope along ``d`` that the elements ``which`` carry."""
    assert isinstance(probe.a, np.ndarray)  # as in _directions
    return float(np.abs(probe.a[which]) @ np.abs(d[which])) if which.any() else 0.0


def _fuzz_along(probe: TensorProbe, d: np.ndarray) -> float:
    """SIGNIFICANCE times what the analytic values' own rounding adds along ``d``: how much
    each varies between points a few units of the type's grid apart (point.Point.coarse_jitter;
    a coordinate's failure allows it as much, reconcile.unfuzzed), 0 where not measured."""
    fuzz = probe.own_rounding() if probe.own_rounding is not None else None
    if fuzz is None:
        return 0.0
    return SIGNIFICANCE * float(np.abs(d) @ np.asarray(fuzz, dtype=np.float64).reshape(-1))


def along(probe: TensorProbe, outcome: CoordinateOutcome, seed: int) -> Along:
    """The directions of :func:`_directions`, each judged as the module says."""
    start = probe.evaluator.count
    results: list[DirectionResult] = []
    thr = probe.threshold
    # Elements whose loss moves as across a jump at every step (steady_difference.py): the
    # loss's slope along a direction may miss their share of it at any step.
    jumps = jumping(outcome.flat, outcome.reasons, probe.size)
    for what, d in _directions(probe, outcome, seed):
        before = probe.evaluator.count
        seen = _measure(probe, d)
        if seen is None:
            continue
        value, error = seen.estimate_value, seen.estimate_error
        missed = jumps if seen.far is None else jumps | seen.far  # shares the loss's slope may miss
        limit = thr / (1.0 - thr) * seen.allowed + _fuzz_along(probe, d) + _share(probe, d, missed)
        beyond = (np.isfinite(error) and abs(value) > SIGNIFICANCE * error + seen.kink
                  and abs(value) > limit and seen.borne)
        scale = max(abs(seen.analytic), abs(seen.analytic + value), probe.floor)
        results.append(DirectionResult(
            analytic=seen.analytic, numeric=seen.analytic + value, error_estimate=error,
            rel_error=abs(value) / scale, ok=not beyond, evaluations=probe.evaluator.count - before))
        if beyond:
            undecided = int(np.sum(outcome.status == INCONCLUSIVE))
            fails = (
                f"{what} the loss's slope is {seen.analytic + value:.4g} (+- {error:.2g}) where "
                f"the gradient gives {seen.analytic:.4g}, off by more than elements each within "
                f"the threshold could add ({limit:.2g}): some element is wrong, though "
                f"{probe.compute_dtype} rounding leaves {undecided} of the checked coordinates "
                f"undecided one by one")
            return Along(tuple(results), fails, probe.evaluator.count - start)
    return Along(tuple(results), None, probe.evaluator.count - start)
