"""Directional checks: the analytic gradient . u against the slope of the loss along u.

For a unit direction u over a part S of a tensor, the loss is evaluated at x +- t u for a
ladder of small steps t (two calls a step, whatever the size of S). What is extrapolated is
the discrepancy itself: on the right (f(x + d+) - f0 - a . d+) / t and on the left
(f0 - f(x - d-) - a . d-) / t, where d+ and d- are the moves the forward really saw, so the
rounding of x +- t u cancels exactly. Both tend to (numeric - analytic) . u as t -> 0.

Random directions through a ReLU network cross kinks. The steps start at the coordinate
step, far below the usual distance to the nearest kink, and each side is extrapolated on
its own: where the sides still disagree, a kink lies within the steps, and the ladder moves
to steps 16 times smaller, twice; a direction that is kinked at every step is no evidence
either way and another direction is drawn. Because a random u weighs every element, a wrong
element shows up as long as its share of the discrepancy exceeds the error bound.

A smooth direction whose bound rounding limits (its propagated rounding half the bound or
more: float32 code judged on its own arithmetic) and that does not yet resolve what it must
(the threshold of its directional derivative; for a share in localisation, a fraction of
its parent's discrepancy) climbs: ladders WIDER, WIDER**2, ... times wider, up to
:func:`.direction_climb.widest_step`, each kept only where its sides agree and its central
tableau bounds the discrepancy more tightly than the last; where rounding still limits,
ladders jittered about the widest kept are averaged (:func:`.direction_climb.jittered`).
"""

from __future__ import annotations

import numpy as np

from ..common.classes import dataclass
from .direction_climb import jittered, widest_step
from .drawn import Vector, dot
from .ladder import NOISE_UNITS, Estimate, tableau
from .probe import TensorProbe
from .widened import root_mean_square

# A direction's discrepancy counts beyond 4 of its error bounds (a coordinate's beyond 3,
# verdict.SIGNIFICANCE): a direction's bound covers a sum over the whole tensor from one
# short ladder, and a direction that counts sends the tensor into localisation and, when no
# coordinate confirms it, to inconclusive; its kink test uses the same margin.
DIRECTION_SIGNIFICANCE = 4.0
ROWS = 3
RATIO = 2.0
FIRST_STEP = 4.0  # the ladder starts at 4 coordinate steps
SHRINK = 16.0  # steps shrink this much when a kink is seen
RETRIES = 2
STEEP_SHRINKS = 5  # a smooth direction whose bound cannot resolve the threshold: steps 16**k smaller
WIDE_ROWS = 2  # a widened ladder: its two rows give a bound from their spread
DEEP_ROWS = 4  # a ladder limited by its steps' size is carried down to this many rows
CLIMB = 4  # a smooth direction rounding still limits: wider ladders, each WIDER times the last
WIDER = 4.0
ELEMENT_AIM = 0.01  # one element off by 1%, at a typical weight, is what a direction climbs to show
ROUNDING_SHARE = 0.25  # rounding limits a bound it carries this share of (propagated, NOISE_UNITS times)


@dataclass(frozen=True)
class DirectionCheck:
    """(numeric - analytic) . u along one direction, with its error bound."""

    discrepancy: float
    error: float
    analytic: float  # a . u
    evaluations: int
    kink: bool  # kinks within every step tried: the discrepancy is not evidence
    unresolved: bool = False  # the bound cannot resolve the threshold: not evidence of agreement
    rounding: bool = False  # the loss's rounding, not the steps' size, limits the bound (smaller steps only worsen it)

    @property
    def significant(self) -> bool:
        return abs(self.discrepancy) > DIRECTION_SIGNIFICANCE * self.error and not self.kink

    @property
    def agrees(self) -> bool:
        """Evidence that the analytic and numeric slopes agree within the threshold."""
        return not (self.significant or self.kink or self.unresolved)


def _ladder(
    probe: TensorProbe, part: slice, u: Vector, t0: float, rows: int,
    known: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[Estimate, Estimate, Estimate, float, tuple[np.ndarray, np.ndarray]]:
    """The ladder's central and one-sided estimates of the discrepancy, the noise of its
    smallest step's quotient, and its raw values (``known``: those of its first rows, which
    are not evaluated again)."""
    steps = t0 / RATIO ** np.arange(rows)
    done = 0 if known is None else known[0].size // 2
    values, predicted = probe.along(part, u, np.stack([steps[done:], -steps[done:]], axis=1).reshape(-1))
    if known is not None:
        values, predicted = np.concatenate([known[0], values]), np.concatenate([known[1], predicted])
    f_plus, f_minus = values[0::2], values[1::2]
    p_plus, p_minus = predicted[0::2], predicted[1::2]
    with np.errstate(over="ignore", invalid="ignore"):  # losses near the type's range: inf, judged as such
        right = (f_plus - probe.f0 - p_plus) / steps
        left = (probe.f0 - f_minus + p_minus) / steps
        noise = probe.moved_noise(f_plus, f_minus)
        one_sided = (2.0 * noise / steps)[:, None]
        central = tableau(((right + left) / 2.0)[:, None], (noise / steps)[:, None], RATIO, 2)
    return (central, tableau(left[:, None], one_sided, RATIO, 1),
            tableau(right[:, None], one_sided, RATIO, 1), float(noise.max() / steps[-1]),
            (values, predicted))


def resolves(probe: TensorProbe, analytic: float, estimate: Estimate) -> bool:
    """The bound resolves the threshold: a discrepancy within SIGNIFICANCE bounds is within
    the threshold of the directional derivative's scale (a non-finite bound resolves nothing).
    That scale is the larger of this slope and the typical one of a random unit direction,
    the tensor's rms gradient (a slope that cancels by chance is judged against it, as a
    coordinate's against the floor)."""
    value, error = float(estimate.value[0]), float(estimate.error[0])
    scale = max(abs(analytic), abs(analytic + value), probe.grad_scale, probe.floor)
    return bool(np.isfinite(error) and np.isfinite(value)
                and DIRECTION_SIGNIFICANCE * error <= probe.threshold * scale)


def _sides_agree(ladder: tuple) -> bool:
    gap = abs(float(ladder[2].value[0] - ladder[1].value[0]))
    return gap <= DIRECTION_SIGNIFICANCE * float(ladder[1].error[0] + ladder[2].error[0])


def first_step(probe: TensorProbe, part: slice) -> float:
    rms = root_mean_square(probe.x[part])
    return FIRST_STEP * probe.eps ** (1.0 / 3.0) * max(1.0, rms)


def _done(probe: TensorProbe, central: Estimate, enough: float, analytic: float | None) -> bool:
    tight = float(central.error[0]) <= enough
    return tight and (analytic is None or resolves(probe, analytic, central))


def _rounding_limited(central: Estimate, noise: float) -> bool:
    return NOISE_UNITS * noise >= ROUNDING_SHARE * float(central.error[0])


def _climbed(probe: TensorProbe, part: slice, u: Vector, t0: float, central: Estimate, noise: float,
            enough: float, analytic: float | None) -> Estimate:
    """``central`` (taken on the ladder from ``t0``, whose smallest step's quotient rounds by
    ``noise``) improved by wider ladders and then jittered ones while rounding limits it and
    it does not resolve what it must: the threshold of the directional derivative ``analytic``
    (a direction of the tensor's check), else a bound of ``enough`` (a share in localisation)."""
    t, widest, kept = t0, None, None  # kept: the widest step whose ladder rounding limited
    for _ in range(CLIMB):
        if _done(probe, central, enough, analytic):
            return central
        if not _rounding_limited(central, noise):
            break
        kept = t
        if widest is None:
            widest = widest_step(probe, part, u)
        t *= WIDER
        if t > widest:
            break
        wide = _ladder(probe, part, u, t, ROWS)
        if not _sides_agree(wide) or not float(wide[0].error[0]) < float(central.error[0]):
            break
        central, noise = wide[0], wide[3]
    else:
        if _rounding_limited(central, noise):
            kept = t
    if kept is None or _done(probe, central, enough, analytic):
        return central
    mean = jittered(probe, part, u, kept, ROWS, RATIO)
    return central if mean is None or not _sides_agree(mean) else Estimate.better(central, mean[0])


def kink_ladders(probe: TensorProbe, part: slice, u: Vector, rows: int) -> tuple[bool, float, tuple]:
    """(kinked, the last ladder's first step, that ladder): ladders of ``rows`` steps from the
    first step, then 16 and 4096 times smaller where the sides disagree (a kink within the
    steps). A smaller ladder clears a kink only where it could have shown the gap seen before:
    a kink at the point keeps its gap at every step, and where rounding swamps that gap the
    sides merely cannot tell (a central estimate there is no evidence)."""
    t0 = first_step(probe, part)
    seen = 0.0  # the gap between the sides where a kink was last seen
    for attempt in range(RETRIES + 1):
        ladder = _ladder(probe, part, u, t0, rows)
        left, right = ladder[1], ladder[2]
        gap = abs(float(right.value[0] - left.value[0]))
        reach = DIRECTION_SIGNIFICANCE * float(left.error[0] + right.error[0])
        if gap <= reach and not 2.0 * reach > seen > 0.0:
            return False, t0, ladder
        seen = max(seen, gap) if gap > reach else seen
        if attempt < RETRIES:
            t0 /= SHRINK ** (attempt + 1)
    return True, t0, ladder


def check_direction(
    probe: TensorProbe, part: slice, u: Vector, rows: int = ROWS, enough: float = 0.0,
    threshold: bool = False,
) -> DirectionCheck:
    """The discrepancy along ``u`` over the contiguous flat range ``part`` of the probed
    tensor (a slice: views, not copies, of its values and gradient), from a
    ladder of ``rows`` steps; larger steps are tried where rounding noise dominates the
    bound and the bound is above ``enough``. With ``threshold``, smaller steps are tried
    where truncation keeps the bound from resolving the probe's threshold, and a check
    whose bound still cannot is marked unresolved (no evidence of agreement)."""
    before = probe.evaluator.count
    kink, t0, (central, left, right, noise, raw) = kink_ladders(probe, part, u, rows)
    bound = float(central.error[0])
    if not kink and bound > enough and noise <= 0.5 * bound and rows < DEEP_ROWS:
        # Smooth and limited by the steps' size, not by rounding: the same ladder further
        # down, extrapolated over more rows (the first rows are not evaluated again).
        deep, deep_left, deep_right, noise, _ = _ladder(probe, part, u, t0, DEEP_ROWS, raw)
        deep_gap = abs(float(deep_right.value[0] - deep_left.value[0]))
        if deep_gap <= DIRECTION_SIGNIFICANCE * float(deep_left.error[0] + deep_right.error[0]):
            central = Estimate.better(central, deep)
        bound = float(central.error[0])
    if not kink and bound > enough and noise > 0.5 * bound:
        wide = _ladder(probe, part, u, t0 * SHRINK, WIDE_ROWS)  # noise-limited and smooth: larger steps
        wide_gap = abs(float(wide[2].value[0] - wide[1].value[0]))
        if wide_gap <= DIRECTION_SIGNIFICANCE * float(wide[1].error[0] + wide[2].error[0]):
            central = Estimate.better(central, wide[0])
            if float(central.error[0]) == float(wide[0].error[0]):
                # A direction of the tensor's check climbs no further than it needs to show
                # one element off by ELEMENT_AIM at a typical weight (1/sqrt(n)).
                aim = max(enough, ELEMENT_AIM * probe.grad_scale / (DIRECTION_SIGNIFICANCE * max(probe.size, 1) ** 0.5))
                central = _climbed(probe, part, u, t0 * SHRINK, central, wide[3], aim if threshold else enough,
                                   dot(probe.a[part], u) if threshold else None)
    analytic = dot(probe.a[part], u)
    shrunk = False  # smaller steps were taken for truncation (a steep direction)
    if not kink and threshold:
        # Smooth but steeper than the steps: the bound cannot resolve the threshold while
        # truncation, not rounding, limits it. Steps 16 times smaller each time, a ladder
        # trusted only where its rows settle and its sides agree, down to rounding's limit.
        step = t0
        for _ in range(STEEP_SHRINKS):
            if resolves(probe, analytic, central) or noise > 0.5 * float(central.error[0]):
                break
            step /= SHRINK
            shrunk = True
            small = _ladder(probe, part, u, step, rows)
            noise = small[3]
            if _sides_agree(small):
                central = Estimate.better(central, small[0])
    error = float(central.error[0])
    unresolved = not kink and bool(threshold) and not resolves(probe, analytic, central)
    return DirectionCheck(
        discrepancy=float(central.value[0]), error=error,
        analytic=analytic, evaluations=probe.evaluator.count - before, kink=kink,
        unresolved=unresolved, rounding=not shrunk and noise > 0.5 * error,
    )
