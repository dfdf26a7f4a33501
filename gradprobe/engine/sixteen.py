"""16-bit code judged on its own arithmetic: a coordinate's rounding measured at the wide
steps it is estimated on, so that a correct gradient can pass and a wrong one fail.

Code that rounds to bfloat16 or float16 inside wider arrays has a loss that rounds at some
units of the 16-bit type. Assumed as eps * max(|f|, the loss scale) for every loss value,
that rounding hides the threshold at every wide step of most coordinates. Yet a pair moving
one coordinate changes only the terms that coordinate reaches: the rounding of every other
term is the same bits on both sides and cancels in the quotient. What is left is measured
on the coordinate, at the steps used, never assumed:

At each of LEVELS steps s, 2s, 4s, 8s, 16s (the widest the largest step of the wide estimate
within BEYOND times the params' scale: a loss smooth well past the params' size, a linear
or quadratic one above all, is read where its rounding is smallest, and the windows' error
model, checked on the coordinate, keeps a window past where the loss bends out; checked
against mpmath on the adversarial inside16 set and on bfloat16 and float16 kernels of
several shapes), JITTERS central quotients at steps s (1 - k JITTER), k =
0..JITTERS-1 (their moves differ by an eighth of the step, GRID_UNITS units of the grid at
least, else the level's rounding is unknown: each term's rounding is drawn afresh, not read
along one tooth of its staircase). A level's quotient is their mean (at the root mean
square of their steps, where its truncation c2 s**2 is the mean of theirs); its rounding is
MARGIN times the largest distance of one of them from the mean, over sqrt(JITTERS) (a
conservative quantile: about twice the mean's spread), or where smaller their largest
distance from the level's line in s**2, widened for the degree of freedom the line takes:
across a jitter of 3/8 of the step c2 s**2 changes by more than half of itself, which is
curvature, not rounding (read as rounding, at the levels where curvature is largest and
then at every level, it left float16 errors of 5 to 20% undecided that float16 resolves by
a factor of ten; checked against a float64 copy of such losses). One loss value's rounding (a quotient's times its
step) is the largest any level within the params' scale shows, taken at every level: a
level whose roundings move together shows too little, one whose quotients all agree none;
where none within the scale shows any, the level beyond it speaks, and where no level shows
any there is no estimate. A level beyond the scale counts its own spread where larger (it
also carries how truncation changes across its jitter, larger there), for itself alone. The
one-sided quotients' gap likewise (at least twice the quotients' rounding), its spread read
over its own step: the gap is f'' times the step, and across a jitter of 3/8 of the step it
changes by as much as 3/8 of itself, which is curvature, not rounding (read as rounding, it
made the kink allowance below hide bugs of twice the gradient in bfloat16); levels within
the params' scale speak for the others as for the quotients. The levels are windows of
:func:`.wide_steps.plain_windowed` and of :func:`.wide_steps.windowed` (Richardson's, where
the level means follow c2 s**2 + c4 s**4 closely enough that one extrapolation gains more
than it costs in rounding), whose error models (quotients that follow the model, a gap that
shrinks with the step, the bound WIDE_SAFETY times the measured higher-order term plus
WIDE_NOISE times the rounding) are checked on the coordinate as for every wide estimate;
the window with the smallest bound.

Its verdicts are :mod:`.sixteen_verdicts`'s.
"""

from __future__ import annotations

import numpy as np

from ..common.roundoff import is_narrow, unit_roundoff
from .ladder import Estimate
from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_ROWS, plain_windowed_at, windowed_at
from .probe import TensorProbe
from .refine import Taken, pairs_reusing

LEVELS = 5  # steps s, 2s, 4s, 8s, 16s: three windows of plain_windowed
JITTERS = 4  # quotients per level
JITTER = 1.0 / 8.0  # of the level's step, between consecutive jittered steps
GRID_UNITS = 4.0  # and at least this many units of the grid the forward sees
MARGIN = 2.0  # a level's rounding: this many times the largest distance from the mean, over sqrt(JITTERS)
BEYOND = 2.0  # the widest level reaches at most this many times the params' scale


def coarse(probe: TensorProbe) -> bool:
    """16-bit arithmetic judged on its own (no wider run)."""
    return (probe.narrow is None and is_narrow(probe.compute_dtype)
            and unit_roundoff(probe.compute_dtype) >= unit_roundoff(np.float16))


def _reach(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    """How far the levels may reach: BEYOND times the params' scale (see the module)."""
    return BEYOND * np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)


def _widest(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    """The widest step of :func:`.wide_steps.wide_estimate` within the levels' reach (its
    smallest where none is)."""
    h0 = probe.prior_steps(flat)
    scale = _reach(probe, flat)
    top = h0 * 2.0 ** (WIDE_LAST + WIDE_ROWS - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        halvings = np.where(top > scale, np.ceil(np.log2(top / np.where(scale > 0, scale, 1.0))), 0.0)
    return np.maximum(top * 2.0 ** -np.clip(halvings, 0.0, None), h0 * 2.0**WIDE_FIRST)


def _mean_and_noise(q: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Over axis 1 (the jitter, at steps ``s``): the mean, and its rounding as the module
    measures it: MARGIN times the largest distance from the mean over sqrt(JITTERS), or where
    smaller the same off the level's line in s**2 (the truncation c2 s**2 changes across a
    level's jitter by more than half of itself: curvature, not rounding), widened by the root
    of the ratio of degrees of freedom the line leaves (JITTERS - 2 of JITTERS - 1)."""
    jitters = q.shape[1]
    mean = q.mean(axis=1)
    around = np.abs(q - mean[:, None, :]).max(axis=1)
    x = s**2 - np.mean(s**2, axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        slope = np.sum(x * (q - mean[:, None, :]), axis=1) / np.sum(x * x, axis=1)
        line = np.abs(q - mean[:, None, :] - np.where(np.isfinite(slope), slope, 0.0)[:, None, :] * x).max(axis=1)
        line = line * np.sqrt((jitters - 1) / (jitters - 2))
    spread = np.where(np.isfinite(line), np.minimum(around, line), around)
    return mean, MARGIN * spread / np.sqrt(jitters)


def jittered_estimate(probe: TensorProbe, flat: np.ndarray, taken: list[Taken]) -> Estimate:
    """The derivative at ``flat`` from jittered quotients at three wide levels (see the
    module): LEVELS * JITTERS pairs a coordinate, those ``taken`` before not again."""
    return _jittered(probe, flat, taken)[0]


def flat_bound(probe: TensorProbe, widest: np.ndarray) -> np.ndarray:
    """For a loss bitwise the loss at the point at every jittered step of every level, both
    sides: how large its slope can be, one spacing of the type over the widest step (the
    spacing of the binade above the loss's measured scale, the largest its terms reach). Two
    values a spacing apart or more round to different points of the grid, and a sum absorbs
    at most half a spacing of a term on each side; a loss flat on one side only (beside a
    kink) moves on the other and is no such loss."""
    spacing = probe.eps * 2.0 ** np.ceil(np.log2(max(probe.loss_scale, 1e-300)))
    with np.errstate(divide="ignore"):
        return spacing / widest


def _pair_jump(gap: np.ndarray, gap_noise: np.ndarray, s: np.ndarray, k: int) -> np.ndarray:
    """The one-sided gap of levels k and k + 1 on its line extrapolated to s = 0, with its
    rounding added (inf where unknown)."""
    s0, s1 = s[k], s[k + 1]
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        w0, w1 = s1 / (s1 - s0), s0 / (s1 - s0)
        jump = np.abs(w0 * gap[k] - w1 * gap[k + 1]) + w0 * gap_noise[k] + w1 * gap_noise[k + 1]
    return np.where(np.isfinite(jump), jump, np.inf)


def _kink_jump(gap: np.ndarray, gap_noise: np.ndarray, s: np.ndarray, top: np.ndarray | None = None) -> np.ndarray:
    """The largest jump of slope that a kink within the levels' steps could have, per
    coordinate (levels by coordinates, ascending): the one-sided gap is f'' s plus, once the
    steps straddle a kink, its jump; the two widest levels straddle every kink within the
    steps, and their line through the gap extrapolated to s = 0 (with its rounding added)
    shows the jump (inf where their gap is unknown). A smooth loss shows its rounding and
    its gap's higher orders only, which make the bound larger, never smaller.

    With ``top`` (per coordinate, the widest level whose quotient the estimate takes, L): only
    kinks within that level move the estimate, and a kink at distance t s_L moves a quotient
    at s_L by (J / 2)(1 - t), a Richardson value of levels L - 1 and L by at most J / 2. The
    line through the gaps of levels k, k + 1 (each twice the last) gives J (1 - 3 t s_L / (2
    s_k)) for a kink within s_k: at least twice the move wherever s_k >= 2 s_L, and the larger
    of the lines at L - 1 and at L at least 1.5 times it; each is a bound, the smallest taken
    (the narrower levels' lines carry less of the gap's higher orders). The widest two as
    above stay a bound in every case (where L is one below the widest, as checked against
    mpmath on the adversarial inside16 and float16 sets before the narrower lines were added)."""
    widest = _pair_jump(gap, gap_noise, s, s.shape[0] - 2)
    if top is None:
        return widest
    pairs = [_pair_jump(gap, gap_noise, s, k) for k in range(s.shape[0] - 1)]
    jump = widest  # never more than the widest two give, as where no level was taken
    for L in range(1, s.shape[0] - 1):
        here = np.maximum(pairs[L - 1], pairs[L])
        for k in range(L + 1, s.shape[0] - 1):
            here = np.minimum(here, pairs[k])
        jump = np.where(top == L, np.minimum(here, widest), jump)
    return jump


def _jittered(probe: TensorProbe, flat: np.ndarray, taken: list[Taken]) -> tuple[Estimate, np.ndarray]:
    """:func:`jittered_estimate`, and per coordinate :func:`_kink_jump` of its levels."""
    est, jump, _, _ = jittered_all(probe, flat, taken)
    return est, jump


def jittered_all(probe: TensorProbe, flat: np.ndarray,
                  taken: list[Taken]) -> tuple[Estimate, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_jittered`, and per coordinate whether the loss was bitwise the loss at the
    point at every step, and the widest step (the smallest of its jitter)."""
    n = flat.size
    top = _widest(probe, flat)
    grid = probe.resolution(flat)
    levels = top * 2.0 ** -np.arange(LEVELS - 1, -1, -1.0)[:, None]  # (levels, n), ascending
    apart = JITTER * levels
    fresh = apart >= GRID_UNITS * grid  # per level; else its roundings are not drawn afresh
    steps = levels[:, None, :] - np.arange(JITTERS)[None, :, None] * apart[:, None, :]  # (levels, jitters, n)
    where = np.tile(flat, LEVELS * JITTERS)
    p = pairs_reusing(probe, where, steps.reshape(-1), taken)
    taken.append((where, steps.reshape(-1), p))
    shape = (LEVELS, JITTERS, n)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        central = p.central.reshape(shape)
        right, left = (q.reshape(shape) for q in p.sides(probe.f0))
        hp, hm = p.h_plus.reshape(shape), p.h_minus.reshape(shape)
        d, e = _mean_and_noise(central, 0.5 * (hp + hm))
        s = np.sqrt(np.mean((0.5 * (hp + hm)) ** 2, axis=1))
        # The one-sided gap is f'' times the step (curvature), which changes across the
        # jitter by up to 3/8 of itself: its rounding is read off the spread of the gap over
        # its own step (f'' there, constant to second order) times the level's step, as the
        # quotients' is off theirs (a kink's jump over the step varies across the jitter, and
        # its spread counts, larger).
        gap = (right - left).mean(axis=1)
        gap_noise = _mean_and_noise((right - left) / (0.5 * (hp + hm)), 0.5 * (hp + hm))[1] * s
        # One loss value's rounding (quotient's times step): the largest any level shows, for
        # every level (one whose roundings move together shows too little of it, one whose
        # quotients all agree none; where no level shows any, it is unknown). The gap's: at
        # least twice the quotients' (each side's rounding over h, not 2h).
        # Levels beyond the params' scale share it as the others do, but their own spread,
        # where larger (it also carries how truncation changes across their jitter, larger
        # there), counts for them alone: it says nothing of the rounding at narrower levels.
        within = levels <= _reach(probe, flat) / BEYOND
        shown = fresh & (e > 0)
        inner = shown & within
        shown = np.where(inner.any(axis=0), inner, shown)
        value = np.where(shown.any(axis=0), np.max(np.where(shown, e * s, 0.0), axis=0), np.inf)
        e = np.where(fresh, np.maximum(value, np.where(within, 0.0, e * s)) / s, np.inf)
        # The gap's the same way: levels within the params' scale speak for all (where any is
        # fresh), one beyond it also for itself where larger.
        told = fresh & within
        told = np.where(told.any(axis=0), told, fresh)
        shared = np.max(np.where(told, gap_noise * s, 0.0), axis=0)
        own = np.where(within, 0.0, gap_noise * s)
        gap_noise = np.where(fresh, np.maximum(np.maximum(shared, own) / s, 2.0 * e), np.inf)
        asymmetry = np.mean(np.abs(hp - hm) / np.maximum(hp + hm, 1e-300), axis=1)
    unmoved = np.all((p.f_plus.reshape(shape) == probe.f0) & (p.f_minus.reshape(shape) == probe.f0), axis=(0, 1))
    widest = np.minimum(hp[-1], hm[-1]).min(axis=0)
    table = (d, s, e, gap, gap_noise, asymmetry, _reach(probe, flat))
    (plain, plain_top), (extrapolated, extrapolated_top) = plain_windowed_at(*table), windowed_at(*table)
    better = extrapolated.error < plain.error
    est = Estimate.where(better, extrapolated, plain)
    return est, _kink_jump(gap, gap_noise, s, np.where(better, extrapolated_top, plain_top)), unmoved, widest
