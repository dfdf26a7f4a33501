"""A side along which the loss keeps its value, for float32 code judged on its own arithmetic
whose rounding leaves the coordinate undecided at the steps within the params' scale.

A unit switched off (a ReLU whose argument sits below 0) leaves the loss bit for bit the same
on one side of the point, often far beyond the params' scale: every one-sided quotient there
is exactly 0. :mod:`.one_side` keeps its windows within the params' scale (beyond it the
loss's higher terms need not follow the model) and a narrow param's scale then holds every
bound at a few times the rounding over a small step. On a side where every loss taken equals
the point's, f0 (the wide steps' pairs on that side out to the widest, and every pair taken
at a smaller step, the ladders'), nothing departs from the model Q(s) = f' + c1 s + ... with
Q = 0 at every step: the window of two neighbouring steps s2 < s3 on that side, every
smaller one flat too, bounds f' as :mod:`.one_side`'s windows do, WIDE_SAFETY times the
truncation it could hide (the rounding of its two quotients, e2 + e3, times s2 / (s3 - s2))
plus WIDE_NOISE times e2, e = 2 noise / s, the noise each pair carries (the coordinate's own
measured rounding within the reach it was measured over, :mod:`.own_rounding`, else the
target's figure at f0; never below the loss's last place). The smallest such bound is taken.
A side flat out to the widest wide step is tried EXTEND doublings further (one call each,
stopping where the loss leaves f0): a unit switched off stays off far beyond a narrow
param's scale, and only a loss that keeps its value bit for bit is used there.

Passes only, as one side's estimates give them (:mod:`.one_side`): the analytic value within
the threshold of 0 at a bound of at most REACH tolerances. A failure needs the kink logic: the
other side may be a kink's. The pairs within the wide steps are those taken before.
"""

from __future__ import annotations

import numpy as np

from ..common.errors import BadOutputError, UserCodeError
from ..common.status import INCONCLUSIVE, PASS
from .ladder import Estimate
from .loose_passes import REACH
from .probe import TensorProbe
from .refine import Taken, pairs_reusing
from .verdict import Judged
from .wide_steps import WIDE_FIRST, WIDE_LAST, WIDE_NOISE, WIDE_ROWS, WIDE_SAFETY

REACH_SLACK = 1e-6  # a step within the measured reach (steps are rounded to the grid)


def flat_side_passes(probe: TensorProbe, flat: np.ndarray, judged: Judged, which: np.ndarray,
                     taken: list[Taken], reasons: tuple[str, ...]) -> Judged:
    """``judged`` with coordinates ``which`` (positions in ``flat``) undecided for one of
    ``reasons`` passed where the loss kept its value on one side at every step taken there
    and the analytic value lies within the threshold of 0 at a bound of at most REACH
    tolerances (see the module's note)."""
    which = which[(judged.status[which] == INCONCLUSIVE)
                  & np.array([judged.reasons[k] in reasons for k in which], dtype=bool)]
    which = which[np.abs(probe.a[flat[which]]) <= probe.tolerance(flat[which], np.zeros(which.size))]
    if which.size == 0:
        return judged
    bound = flat_side_bound(probe, flat[which], taken)
    tol = probe.tolerance(flat[which], np.zeros(which.size))
    k = np.flatnonzero(bound <= REACH * tol)
    if k.size == 0:
        return judged
    mine = Judged(np.full(k.size, PASS, dtype=judged.status.dtype), Estimate(np.zeros(k.size), bound[k]),
                  tuple(None for _ in k), np.zeros(k.size, dtype=bool))
    return judged.merged(which[k], mine)


EXTEND = 4  # a side still flat at the widest wide step is tried this many doublings further


def flat_side_bound(probe: TensorProbe, flat: np.ndarray, taken: list[Taken]) -> np.ndarray:
    """Per coordinate, the bound on f' from a side where every loss taken equals f0 (the
    smaller of the two sides'); infinite where neither side is flat. A side flat out to the
    widest wide step is tried EXTEND doublings further, one call each, until the loss leaves
    f0 there (beyond the params' scale: only a loss that keeps its value is used)."""
    n = flat.size
    ks = np.arange(WIDE_FIRST, WIDE_LAST + WIDE_ROWS)
    steps = probe.prior_steps(flat)[None, :] * 2.0 ** ks[:, None]
    p = pairs_reusing(probe, np.tile(flat, ks.size), steps.reshape(-1), taken)
    kept_r, kept_l = _smaller_flat(probe, flat, steps[0], taken)
    best = np.full(n, np.inf)
    for sign, values, moved, kept in ((1.0, p.f_plus, p.h_plus, kept_r), (-1.0, p.f_minus, p.h_minus, kept_l)):
        s = moved.reshape(ks.size, n)
        same = (values.reshape(ks.size, n) == probe.f0) & (s > 0)
        same &= np.cumprod(same, axis=0).astype(bool) & kept[None, :]
        s, same = _extended(probe, flat, sign, s, same)
        e = 2.0 * _flat_noise(probe, flat, s) / np.where(s > 0, s, np.inf)
        with np.errstate(divide="ignore", invalid="ignore"):
            for i in range(s.shape[0] - 1):
                ok = same[i + 1] & (s[i + 1] > s[i])
                trunc = (e[i] + e[i + 1]) * s[i] / (s[i + 1] - s[i])
                bound = np.where(ok, WIDE_SAFETY * trunc + WIDE_NOISE * e[i], np.inf)
                best = np.minimum(best, np.nan_to_num(bound, nan=np.inf))
    return best


def _extended(probe: TensorProbe, flat: np.ndarray, sign: float, s: np.ndarray,
              same: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The steps ``s`` on one side (rows ascending) and whether the loss kept f0 out to each,
    with EXTEND doublings beyond the widest for coordinates flat out to it (one call each,
    stopping where the loss leaves f0 or forward's domain)."""
    more_s = np.zeros((EXTEND, flat.size))
    more_same = np.zeros((EXTEND, flat.size), dtype=bool)
    todo = np.flatnonzero(same[-1])
    x = probe.x[flat].astype(np.float64)
    top = s[-1].copy()
    for k in range(EXTEND):
        if todo.size == 0:
            break
        target = top[todo] * 2.0
        with np.errstate(over="ignore", invalid="ignore"):
            moved = (x[todo] + sign * target).astype(probe.x.dtype)
        try:
            values = probe.evaluator.single_moves(probe.tensor, flat[todo], (moved,))[:, 0]
        except (UserCodeError, BadOutputError):
            break  # outside forward's domain: the flat stretch ends here
        step = np.abs(moved.astype(np.float64) - x[todo])
        ok = (values == probe.f0) & np.isfinite(step) & (step > top[todo])
        more_s[k, todo], more_same[k, todo] = step, ok
        top[todo[ok]] = step[ok]
        todo = todo[ok]
    return np.vstack([s, more_s]), np.vstack([same, more_same])


def _flat_noise(probe: TensorProbe, flat: np.ndarray, s: np.ndarray) -> np.ndarray:
    """The rounding of a loss value equal to f0 at steps ``s`` (rows) along each coordinate:
    its own measured rounding within the reach measured (:mod:`.own_rounding`'s view carries
    it as ``rounding``), else the target's figure; never below the loss's last place."""
    target = float(probe.loss_noise(np.array([probe.f0]))[0])
    own = getattr(probe, "rounding", {})
    figure = np.array([own.get(int(c), (np.nan, np.nan)) for c in flat], dtype=np.float64).reshape(-1, 2)
    with np.errstate(invalid="ignore"):
        mine = np.isfinite(figure[:, 0])[None, :] & (s <= figure[:, 1][None, :] * (1.0 + REACH_SLACK))
    floor = probe.eps * abs(probe.f0)
    return np.where(mine, np.maximum(np.nan_to_num(figure[:, 0])[None, :], floor), target)


def _smaller_flat(probe: TensorProbe, flat: np.ndarray, below: np.ndarray,
                  taken: list[Taken]) -> tuple[np.ndarray, np.ndarray]:
    """Per coordinate and side: every pair ``taken`` at a step below ``below`` (the ladders'
    steps under the wide ones) kept f0 on that side."""
    pos = {int(c): i for i, c in enumerate(flat.tolist())}
    right, left = np.ones(flat.size, dtype=bool), np.ones(flat.size, dtype=bool)
    for where, asked, p in taken:
        for k, (c, s) in enumerate(zip(where.tolist(), asked.tolist())):
            i = pos.get(int(c))
            if i is None or not s < below[i]:
                continue
            right[i] &= bool(p.f_plus[k] == probe.f0)
            left[i] &= bool(p.f_minus[k] == probe.f0)
    return right, left


__all__ = ["flat_side_bound", "flat_side_passes"]
