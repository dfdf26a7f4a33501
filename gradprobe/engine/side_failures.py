"""Failures from each side of the point on its own (:mod:`.sides_apart`), checked on the
coordinate's own measured rounding before they stand.

The sides' rows start where a quotient's rounding (the target's figure) is a small share of
the tolerance, often far from the point. Their tableau takes the loss as smooth below its
steps. The target's figure can sit above a feature finer than those steps (a fast sine
beside a huge term, its amplitude a few times the loss's real rounding but below the
figure): every row then looks like rounding about a smooth slope, the tableau settles on
its top rows, and the feature's derivative, the one at the point, escapes. Where the
coordinate's own rounding (:func:`.own_rounding.own_rounding`, measured along it alone)
lies below the target's figure, a failure stands only where the rows' tableaux, built again
with that rounding (a side drifting like c/h given no bound), still fail: the rows change
beyond it row after row where such a feature lies among them, which the tableau's
smoothness checks refuse. And wherever it lies, every pair the ladders took within the
sides' smallest step must agree with the sides' slopes (f(x+h) - f(x-h) against right * h +
left * h, and each side's move against its own slope, each side's bound as judged) within
twice the smaller of the two roundings: a feature below the sides' steps shows there (a
sine of amplitude a few roundings, period 3e-6, beneath side rows from 1.4e-5 up whose
loss barely moved: the ladders' pairs at 2e-6 to 4e-6 moved it by 5 roundings on either
side, steep-73003).

Otherwise undecided (UNSETTLED): no pass is given, and a bug the sides' rows do resolve
keeps failing where they are smooth on the rounding measured.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL
from .kinks import NEAR_SAFETY
from .ladder import Estimate
from .own_rounding import own_rounding
from .probe import TensorProbe
from .refine import Taken
from .sides_apart import SideRows, judge_sides_apart, side_estimate
from .verdict import UNSETTLED, Judged

PAIR_NOISE = 2.0  # a central pair's difference rounds by up to twice one loss value's rounding


def failures_on_own_rounding(probe: TensorProbe, flat: np.ndarray, apart: Judged, left: Estimate,
                             right: Estimate, rows: tuple[SideRows, SideRows], taken: list[Taken]
                             ) -> tuple[Judged, np.ndarray]:
    """``apart`` (the sides' verdicts from ``left`` and ``right``, estimated on ``rows``)
    with each failure checked on the coordinate's own rounding as the module says; also
    where a failure did not stand."""
    fails = np.flatnonzero(apart.status == FAIL)
    unsettled = np.zeros(flat.size, dtype=bool)
    if fails.size == 0:
        return apart, unsettled
    measured = own_rounding(probe, flat[fails])[0]
    figure = probe.loss_noise(np.full(fails.size, probe.f0))
    with np.errstate(invalid="ignore"):
        lower = np.isfinite(measured) & (measured < figure)
    rounding = np.where(lower, measured, figure)  # the pairs' check: on either figure

    def remeasured(side: SideRows) -> Estimate:
        picked = SideRows(side.values[:, which], side.moved[:, which], side.quotients[:, which])
        estimate, drift = side_estimate(probe, picked, measured[lower])
        return Estimate(estimate.value, np.where(drift, np.inf, estimate.error))

    which = fails[lower]
    failed_again = np.ones(fails.size, dtype=bool)
    if which.size:
        again = judge_sides_apart(probe, flat[which], remeasured(rows[0]), remeasured(rows[1]))
        failed_again[lower] = again.status == FAIL
    smallest = np.minimum(rows[0].moved[-1, fails], rows[1].moved[-1, fails])
    off = pairs_off_the_sides(flat[fails], left.pick(fails), right.pick(fails), smallest, rounding, taken,
                              probe.f0)
    gone = fails[~failed_again | off]
    unsettled[gone] = True
    return (apart.undecided(gone, (UNSETTLED,) * gone.size, noise_limited=False) if gone.size else apart), unsettled


def pairs_off_the_sides(flat: np.ndarray, left: Estimate, right: Estimate, smallest: np.ndarray,
                        rounding: np.ndarray, taken: list[Taken], f0: float) -> np.ndarray:
    """Per coordinate ``flat[i]``: a pair ``taken`` before, both its moves within
    ``smallest[i]``, whose loss difference lies off what the sides' slopes predict (right *
    h+ + left * h-, each side's bound widened NEAR_SAFETY-fold as judged) by more than
    PAIR_NOISE times ``rounding[i]`` (one loss value's) or the pair's own noise where that is
    smaller; or one of whose moves from the loss at the point ``f0`` lies off its side's
    slope (right * h+, left * h-) by as much. A feature even about the point (a fast sine
    near its crest) moves both sides alike and leaves the central difference as it was;
    each side's move shows it."""
    off = np.zeros(flat.size, dtype=bool)
    position = {int(c): i for i, c in enumerate(flat.tolist())}
    for where, _, p in taken:
        mine = np.flatnonzero(np.isin(where, flat))
        if mine.size == 0:
            continue
        i = np.array([position[int(c)] for c in where[mine]])
        h_plus, h_minus = p.h_plus[mine], p.h_minus[mine]
        with np.errstate(invalid="ignore", over="ignore"):
            within = np.maximum(h_plus, h_minus) <= smallest[i]
            noise = PAIR_NOISE * np.minimum(rounding[i], p.noise[mine])
            reach_plus, reach_minus = (NEAR_SAFETY * right.error[i] * h_plus, NEAR_SAFETY * left.error[i] * h_minus)
            predicted = right.value[i] * h_plus + left.value[i] * h_minus
            beyond = np.abs(p.f_plus[mine] - p.f_minus[mine] - predicted) > reach_plus + reach_minus + noise
            beyond |= np.abs(p.f_plus[mine] - f0 - right.value[i] * h_plus) > reach_plus + noise
            beyond |= np.abs(f0 - p.f_minus[mine] - left.value[i] * h_minus) > reach_minus + noise
        off[i[within & beyond]] = True
    return off


__all__ = ["failures_on_own_rounding", "pairs_off_the_sides"]
