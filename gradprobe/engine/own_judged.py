"""Coordinates of float32 code judged on its own arithmetic that rounding left undecided,
judged again with the rounding each one's loss shows when it alone moves (measured by
:func:`.own_rounding.own_rounding`, never below the values' own last place).

The wide steps are judged again with the measured figure, with windows without
extrapolation too (:func:`.wide_steps.plain_windowed`: rounding, not curvature, limits these
quotients); those still undecided by rounding, on the widest steps within reach averaged over
jittered pairs (:mod:`.averaged`), then on one side (:mod:`.one_side`), then on quotients at
many steps fitted as one curve (:mod:`.fitted`), then on the loss along one side fitted as one
curve (:mod:`.side_fit`: a kink beside the point on the other); last, on a side where the loss kept its value
at every step taken (:mod:`.flat_side`), with the rounding the moving side's row shows where
nothing else was measured. What stays undecided says the smallest relative error its rounding
lets show.
"""

from __future__ import annotations

import numpy as np

from .averaged import averaged_estimate, within_reach
from .fitted import fitted_passes
from .flat_side import flat_side_passes
from .side_fit import side_fitted_passes
from .one_side import narrow_passes, one_sided_passes
from .wide_steps import WIDE_NOISE
from .wide_step_kinks import KINK_WITHIN, kinks_within_reach
from .probe import Pairs, TensorProbe
from .refine import Taken
from .verdict import NOISE, SIGNIFICANCE, Judged, judge_plain
from ..common.roundoff import unit_roundoff
from ..common.status import INCONCLUSIVE
from .own_rounding import MEASURED, REACH_SLACK, own_rounding, widest_steps
UNMODELLED = ("the loss along it does not follow the error model of central differences at the wide "
              "steps that rounding needs")


def renoised(p: Pairs, flat: np.ndarray, rounding: dict[int, tuple[float, float]], eps: float) -> Pairs:
    """``p`` (pairs at coordinates ``flat``) with the measured rounding in place of the
    target's figure where one was measured and the pair's moves stay within the reach it was
    measured over (never below the values' own last place)."""
    own = np.array([rounding.get(int(k), (np.nan, np.nan)) for k in flat], dtype=np.float64).reshape(-1, 2)
    figure, reach = own[:, 0], own[:, 1]
    with np.errstate(invalid="ignore"):
        mine = np.isfinite(figure) & (np.maximum(p.h_plus, p.h_minus) <= reach * (1.0 + REACH_SLACK))
    floor = eps * np.maximum(np.abs(p.f_plus), np.abs(p.f_minus))
    noise = np.where(mine, np.maximum(np.nan_to_num(figure), floor), p.noise)
    return Pairs(p.f_plus, p.f_minus, p.h_plus, p.h_minus, noise)


class OwnRounding(TensorProbe):
    """A probe whose pairs carry each coordinate's own measured rounding."""

    rounding: dict[int, tuple[float, float]]

    def pairs(self, flat: np.ndarray, h: np.ndarray) -> Pairs:
        return renoised(super().pairs(flat, h), flat, self.rounding, self.eps)


def renoised_taken(taken: list[Taken], rounding: dict[int, tuple[float, float]], eps: float) -> list[Taken]:
    """The pairs ``taken`` with the measured ``rounding`` in place of the target's figure
    (:func:`renoised`), for judging again on it."""
    return [(f, s, renoised(p, f, rounding, eps)) for f, s, p in taken]


def with_own(probe: TensorProbe, rounding: dict[int, tuple[float, float]]) -> OwnRounding:
    view = OwnRounding.__new__(OwnRounding)
    view.__dict__.update(probe.__dict__)
    view.rounding = rounding
    return view


def judged_on_own_rounding(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]) -> Judged:
    """Coordinates ``flat`` that rounding left undecided in ``judged`` (the wide steps' verdicts
    included) judged again on the wide steps with each one's own measured rounding (pairs
    ``taken`` before are reused); where still undecided, the reason names the smallest
    relative error its rounding would let show."""
    if unit_roundoff(probe.compute_dtype) >= unit_roundoff(np.float16):
        return judged  # 16-bit arithmetic: a staircase of its own (see .along)
    noisy = np.flatnonzero((judged.status == INCONCLUSIVE) & np.array([r == NOISE for r in judged.reasons], dtype=bool))
    if noisy.size == 0:
        return judged
    noisy = noisy[:MEASURED]
    where = flat[noisy]
    measured, reach, level, beside = own_rounding(probe, where)
    rounding = {int(k): (float(v), float(r)) for k, v, r in zip(where, measured, reach) if np.isfinite(v)}
    flat_sides = {int(k): (float(v), float(r)) for k, v, r in zip(where, beside, reach) if np.isfinite(v)}
    if rounding:
        view = with_own(probe, rounding)
        again = renoised_taken(taken, rounding, probe.eps)
        mine = np.flatnonzero(np.isfinite(measured))
        est = within_reach(view, where[mine], reach[mine], again)
        redo = kinks_within_reach(view, where[mine], judge_plain(view, where[mine], est), again)
        decided = np.flatnonzero((redo.status != INCONCLUSIVE) | np.array([r == KINK_WITHIN for r in redo.reasons], dtype=bool))
        judged = judged.merged(noisy[mine[decided]], redo.pick(decided))
        judged = _averaged(view, flat, judged, noisy[mine], reach[mine], again)
        judged = _one_side(view, flat, judged, noisy, again)
        judged = fitted_passes(view, flat, judged, noisy, measured, reach, widest_steps(probe, where), again,
                               (NOISE, KINK_WITHIN))
        judged = side_fitted_passes(view, flat, judged, noisy, measured, reach, widest_steps(probe, where), again,
                                    (NOISE, KINK_WITHIN))
    else:
        judged = _one_side(probe, flat, judged, noisy, taken)
    # A side where the loss kept its value, on its own quotients (passes only), with the
    # rounding the moving side shows where nothing else was measured (see _beside_flat).
    judged = flat_side_passes(with_own(probe, {**rounding, **flat_sides}), flat, judged, noisy, taken,
                              (NOISE, KINK_WITHIN))
    still = np.flatnonzero((judged.status[noisy] == INCONCLUSIVE))
    if still.size == 0:
        return judged
    return _explained(probe, flat, judged, noisy[still], measured[still], reach[still], level[still])


def _one_side(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, taken: list[Taken]) -> Judged:
    """Coordinates ``which`` still undecided for rounding, or for a kink within the wide steps,
    passed on one side's quotients or on rows below the wide steps (:mod:`.one_side`)."""
    why = (NOISE, KINK_WITHIN)
    return narrow_passes(probe, flat, one_sided_passes(probe, flat, judged, which, taken, why), which, taken, why)


def _averaged(view: OwnRounding, flat: np.ndarray, judged: Judged, which: np.ndarray, reach: np.ndarray,
              taken: list[Taken]) -> Judged:
    """``judged`` with coordinates ``which`` (their own rounding measured over ``reach``) that
    rounding still leaves undecided judged on wide steps averaged over jittered pairs
    (:mod:`.averaged`: one more batch of evaluations before giving up)."""
    left = np.flatnonzero((judged.status[which] == INCONCLUSIVE)
                          & np.array([judged.reasons[k] == NOISE for k in which], dtype=bool))
    if left.size == 0:
        return judged
    where = flat[which[left]]
    est = averaged_estimate(view, where, reach[left], taken)
    more = kinks_within_reach(view, where, judge_plain(view, where, est), taken)
    decided = np.flatnonzero((more.status != INCONCLUSIVE) | np.array([r == KINK_WITHIN for r in more.reasons], dtype=bool))
    # Still undecided by rounding: the tighter bound is kept, the verdict and reason as they
    # were (16-bit code on its float32 run is judged on it at its own threshold, promote.py).
    tighter = np.flatnonzero((more.status == INCONCLUSIVE) & np.array([r == NOISE for r in more.reasons], dtype=bool)
                             & (more.estimate.error < judged.estimate.error[which[left]]))
    kept = judged.pick(which[left[tighter]])
    judged = judged.merged(which[left[tighter]], Judged(kept.status, more.estimate.pick(tighter), kept.reasons,
                                                        kept.noise_limited))
    return judged.merged(which[left[decided]], more.pick(decided))


def _explained(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray, measured: np.ndarray,
               reach: np.ndarray, level: np.ndarray) -> Judged:
    """The NOISE reason of coordinates ``which`` with the smallest relative error that
    rounding alone lets show on each: SIGNIFICANCE times the least bound a wide-step window
    can have, WIDE_NOISE times the rounding of the central quotient at half the widest step
    on the coordinate's smooth range (the estimate of the widest window without
    extrapolation), over its scale. The rounding is the one measured when the coordinate
    moves, at steps within the reach it was measured over, or the target's figure at the
    widest step its scale allows, whichever lets the smaller error show. Where the loss kept
    its value at the point at every point measured on one side or both (``level``: 1 or 2),
    the reason says so: what the coordinate moves there stays below the loss's rounding,
    which only the target's figure bounds."""
    where = flat[which]
    widest = widest_steps(probe, where)
    target = WIDE_NOISE * 2.0 * probe.loss_noise(np.full(where.size, probe.f0)) / widest
    with np.errstate(invalid="ignore", divide="ignore"):
        own = np.where(np.isfinite(measured), WIDE_NOISE * 2.0 * measured / np.minimum(reach, widest), np.inf)
    quotient = np.minimum(own, target)
    scale = probe.denominators(where, judged.estimate.value[which])
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):  # a scale of the floor's tiny value
        smallest = np.maximum(SIGNIFICANCE * quotient, probe.threshold * scale) / scale
    reasons = list(judged.reasons)
    for k, i in enumerate(which):
        if reasons[i] != NOISE:
            continue
        if own[k] > target[k]:
            how, steps = "measured for the whole target", "the widest step its scale allows"
        elif reach[k] < widest[k]:
            how, steps = "measured when it moves", f"the widest step its rounding was measured over ({reach[k]:.2g})"
        else:
            how, steps = "measured when it moves", "the widest step its scale allows"
        if level[k] and SIGNIFICANCE * quotient[k] > probe.threshold * scale[k]:
            where_level = "on either side" if level[k] == 2 else "on one side"
            reasons[i] = (f"{NOISE}: the loss kept its value at the point at every point measured {where_level} "
                          f"of it (out to {widest[k]:.2g}), so what the coordinate changes there stays below the "
                          f"loss's rounding, and that rounding (measured for the whole target) hides any relative "
                          f"error below {smallest[k]:.2g} on it")
        elif SIGNIFICANCE * quotient[k] <= probe.threshold * scale[k]:
            reasons[i] = (f"{UNMODELLED} (its rounding, {how}, would let an error of the "
                          f"threshold show at {steps.replace('the widest step', 'the widest steps')})"
                          f"{_narrower(probe, judged.estimate.error[i], scale[k])}")
        else:
            reasons[i] = (f"{NOISE}: its rounding ({how}) hides any relative error below "
                          f"{smallest[k]:.2g} on it, even at {steps}")
    return Judged(judged.status, judged.estimate, tuple(reasons), judged.noise_limited)


def _narrower(probe: TensorProbe, bound: float, scale: float) -> str:
    """The smallest relative error the narrower steps (the ladders' bound, checked there) let
    show, SIGNIFICANCE bounds over the scale; empty where they bound nothing finer."""
    if not (np.isfinite(bound) and scale > 0 and SIGNIFICANCE * bound > probe.threshold * scale):
        return ""
    return f"; at the narrower steps where it does, rounding hides any relative error below {SIGNIFICANCE * bound / scale:.2g}"


__all__ = ["judged_on_own_rounding"]
