"""Coordinates whose ladders kept crossing kinks: one-sided slopes down to the smallest step
that rounding noise allows.

An absolute-error loss whose residuals sit near zero has kinks along a coordinate at many
distances from the point (1e-12, 1e-10, 1e-8 ... of the param's scale). Ladders whose steps
start near eps**(1/3) |x| cross them at every row, and their quotients do not settle. Between
the point and the nearest kink on one side the loss is smooth (linear, for a piecewise-linear
loss), and that side's one-sided quotients there are that side's derivative at the point:
the same value at every such step, as far as the loss's rounding (2 delta / h) lets them show.

So each coordinate gets one-sided quotients on both sides at steps h_lo * 2**k, k < ROWS,
h_lo the power of two at which a one-sided quotient's rounding noise is BELOW_NOISE times the
tolerance (the smallest step that can still show anything), up to 2**(ROWS - 1) times that
(noise 1/64 of the tolerance). A side is *seen* where RUN consecutive rows (steps spanning
2**(RUN - 1)-fold) agree within the tolerance, the widest of them with a noise of at most
NOISE_SHARE of it: a kink closer to the point than those steps would move the quotients by
jump * distance / h, which the agreement across the span bounds below the loss's rounding.

- The analytic value agrees with a seen side over such a run on both sides: pass.
- On one side only: a kink (the value is that side's derivative; the other side crosses a
  kink at or closer than the steps).
- Both sides seen at the same RUN steps, apart by more than twice the tolerance at each (a
  jump that stays as the step shrinks 8-fold: the point on a kink of a piecewise-linear loss,
  or one closer than the smallest step), and the value between them: a kink (the value a
  kink between them gives, as at a kink the ladders see; see kinks.py).
- Neither side seen (kinks closer than the smallest step on both): the slopes beyond those
  kinks, from secants between the same steps, and a value between them is a kink
  (kink_secants.py says when).
- Otherwise the coordinate stays undecided, and the reason says what was not resolved: the
  derivative on neither side (kinks closer than the smallest step on both), on one side only
  (and the value is not the other side's), or seen on both sides and the value neither
  between nor on them (more kinks at the point, or closer than any step, may still give it).

Only passes and kinks come from here, never a failure: a value off the sides seen here can
still be one that kinks hidden below the smallest step give (see test_kink_unresolved.py);
the second look off the point (offpoint.py) checks these coordinates again. Sides that curve
(a loss smooth but not linear beside its kink) settle on the ladders' tableaux instead.
Float64 code only: narrow code's steps at rounding's floor are its own modules' concern.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..common.classes import dataclass
from ..common.roundoff import is_narrow
from ..common.status import INCONCLUSIVE, KINK, PASS
from .kink_secants import kink_beyond, secant_side
from .ladder import NOISE_UNITS, SAFETY, Estimate
from .probe import TensorProbe
from .refine import Taken, pairs_reusing
from .verdict import CLOSE_BOTH, CLOSE_NEITHER, CLOSE_ONE, CROSSING, Judged

ROWS = 9  # steps h_lo .. 256 h_lo
BELOW_NOISE = 4.0  # at h_lo a one-sided quotient's rounding noise is 4 times the tolerance
RUN = 4  # rows in a run: steps spanning 8-fold
NOISE_SHARE = 0.5  # the run's widest step has a noise of at most half the tolerance


def close_steps(probe: TensorProbe, flat: np.ndarray) -> np.ndarray:
    """Per coordinate the smallest step h_lo (a power of two): 2 delta / h_lo is BELOW_NOISE
    times the tolerance at the analytic value (the one a side must show); the top step
    2**(ROWS - 1) h_lo is kept within the params' own scale (as every step grown to beat noise
    is)."""
    tol = probe.tolerance(flat, probe.a[flat])
    delta = probe.loss_noise(np.full(flat.size, probe.f0))
    with np.errstate(divide="ignore", over="ignore"):
        low = np.exp2(np.ceil(np.log2(2.0 * delta / np.maximum(tol, 1e-300) / BELOW_NOISE)))
    cap = np.maximum(np.abs(probe.x[flat].astype(np.float64)), probe.x_scale)
    top = np.minimum(low * 2.0 ** (ROWS - 1), np.exp2(np.floor(np.log2(np.maximum(cap, 1e-300)))))
    return np.maximum(top * 2.0 ** -(ROWS - 1), 4.0 * probe.resolution(flat))


@dataclass(frozen=True)
class Sides:
    """One side's quotients (rows of ascending steps, coordinates), their rounding noise and
    where the RUN rows ending at each row are steady (:func:`_steady_rows`)."""

    q: np.ndarray
    noise: np.ndarray
    steady: np.ndarray


def _steady_rows(q: np.ndarray, tol: np.ndarray, fine: np.ndarray) -> np.ndarray:
    """Per row k >= RUN - 1 (rows, coordinates): the RUN rows ending at k agree within
    ``tol`` (the side's derivative seen there, whatever the analytic value), and row k's
    noise is ``fine``. Rows before RUN - 1 are False."""
    out = np.zeros(q.shape, dtype=bool)
    for k in range(RUN - 1, q.shape[0]):
        w = q[k - RUN + 1:k + 1]
        out[k] = (w.max(axis=0) - w.min(axis=0) <= tol) & fine[k]
    return out


def _kink_between(left: Sides, right: Sides, a: np.ndarray, tol: np.ndarray) -> tuple[np.ndarray, Estimate]:
    """Per coordinate: at the same RUN steps both sides are seen (steady), they differ by
    more than twice the tolerance at each of them (a jump that stays as the step shrinks
    8-fold: a kink at the point, or closer than the smallest step), and the analytic value
    lies between them (within the tolerance): a value a kink between them gives. And the
    side nearer the value there (the estimate reported, with its run's spread and rounding)."""
    found = np.zeros(a.shape, dtype=bool)
    value, error = np.full(a.shape, np.nan), np.full(a.shape, np.inf)
    for k in range(RUN - 1, left.q.shape[0]):
        rows = slice(k - RUN + 1, k + 1)
        apart = (np.abs(right.q[rows] - left.q[rows]) > 2.0 * tol).all(axis=0)
        low, high = np.minimum(left.q[k], right.q[k]), np.maximum(left.q[k], right.q[k])
        here = left.steady[k] & right.steady[k] & apart & (a >= low - tol) & (a <= high + tol) & ~found
        use_left = np.abs(a - left.q[k]) <= np.abs(a - right.q[k])
        for s_, mask in ((left, use_left), (right, ~use_left)):
            w = s_.q[rows]
            bound = SAFETY * (w.max(axis=0) - w.min(axis=0)) + NOISE_UNITS * s_.noise[k]
            value = np.where(here & mask, s_.q[k], value)
            error = np.where(here & mask, bound, error)
        found |= here
    return found, Estimate(value, error)


def _agreeing(q: np.ndarray, noise: np.ndarray, a: np.ndarray, tol: np.ndarray) -> tuple[np.ndarray, Estimate]:
    """Per coordinate: a run of rows agreeing with ``a`` (see the module's note), and the
    estimate at the widest such row (its value, its run's spread and its rounding)."""
    ok = np.abs(q - a) <= tol
    fine = noise <= NOISE_SHARE * tol
    found = np.zeros(a.shape, dtype=bool)
    value, error = np.full(a.shape, np.nan), np.full(a.shape, np.inf)
    for k in range(RUN - 1, q.shape[0]):
        here = ok[k - RUN + 1:k + 1].all(axis=0) & fine[k]
        w = q[k - RUN + 1:k + 1]
        bound = SAFETY * (w.max(axis=0) - w.min(axis=0)) + NOISE_UNITS * noise[k]
        better = here & (bound < error)
        found |= here
        value, error = np.where(better, q[k], value), np.where(better, bound, error)
    return found, Estimate(value, error)


def close_look(probe: TensorProbe, flat: np.ndarray, taken: list[Taken]) -> Judged:
    """Passes and kinks where one-sided quotients at the smallest steps rounding allows show
    the analytic value as a side's derivative; the others undecided, with the reason what was
    not resolved (module's note; None where rounding, not kinks, kept every step from
    resolving the threshold). Pairs ``taken`` before at the same steps are reused, and
    the new ones added to ``taken``."""
    n = flat.size
    low = close_steps(probe, flat)
    steps = np.concatenate([low * 2.0**k for k in range(ROWS)])
    where = np.tile(flat, ROWS)
    p = pairs_reusing(probe, where, steps, taken)
    taken.append((where, steps, p))
    right, left = (s.reshape(ROWS, n) for s in p.sides(probe.f0))
    noise_r = (2.0 * p.noise / p.h_plus).reshape(ROWS, n)
    noise_l = (2.0 * p.noise / p.h_minus).reshape(ROWS, n)
    a = probe.a[flat]
    tol = probe.tolerance(flat, a)
    on_left, est_left = _agreeing(left, noise_l, a, tol)
    on_right, est_right = _agreeing(right, noise_r, a, tol)
    # The sides themselves are judged at their own size (the analytic value may be far off).
    tol_seen = probe.tolerance(flat, np.maximum(np.abs(left[-1]), np.abs(right[-1])))
    sides = [Sides(q, e, _steady_rows(q, tol_seen, e <= NOISE_SHARE * tol_seen))
             for q, e in ((left, noise_l), (right, noise_r))]
    seen_left, seen_right = (np.asarray(s.steady.any(axis=0), dtype=bool) for s in sides)
    status = np.full(n, INCONCLUSIVE, dtype=np.int8)
    between, nearer = _kink_between(sides[0], sides[1], a, tol_seen)
    status[between] = KINK
    status[on_left | on_right] = KINK
    status[on_left & on_right] = PASS
    # Kinks closer than any resolvable step on a side: the slopes beyond them (kink_secants.py).
    plus, minus = p.f_plus.reshape(ROWS, n) - probe.f0, probe.f0 - p.f_minus.reshape(ROWS, n)
    one_noise = p.noise.reshape(ROWS, n)
    beyond, slopes = kink_beyond(secant_side(minus, p.h_minus.reshape(ROWS, n), one_noise, tol_seen),
                                 secant_side(plus, p.h_plus.reshape(ROWS, n), one_noise, tol_seen),
                                 a, tol)
    beyond &= (status == INCONCLUSIVE) & ~seen_left & ~seen_right
    status[beyond] = KINK
    chosen = Estimate.better(est_left, est_right)
    chosen = Estimate.where(np.isfinite(chosen.error), chosen, nearer)
    chosen = Estimate.where(beyond, slopes, chosen)
    value = np.where(np.isfinite(chosen.error), chosen.value, np.nan)
    # Where no step of either side beats the noise (a tolerance near 0, steps capped by the
    # params' scale), rounding, not kinks, is what the steps could not resolve: no reason here.
    resolves = (noise_l[-1] <= NOISE_SHARE * tol_seen) | (noise_r[-1] <= NOISE_SHARE * tol_seen)
    reasons: list[str | None] = []
    for k in range(n):
        if status[k] != INCONCLUSIVE or not resolves[k]:
            reasons.append(None)
        elif seen_left[k] and seen_right[k]:
            reasons.append(CLOSE_BOTH)
        elif seen_left[k] or seen_right[k]:
            reasons.append(CLOSE_ONE)
        else:
            reasons.append(CLOSE_NEITHER)
    return Judged(status, Estimate(value, chosen.error), tuple(reasons), np.zeros(n, dtype=bool))


def looked_closer(probe: TensorProbe, flat: np.ndarray, judged: Judged, taken: list[Taken]
                  ) -> tuple[Judged, Callable[[Judged], Judged]]:
    """``judged`` (verdicts of ``flat``) with the passes and kinks :func:`close_look` finds
    among the coordinates left undecided by steps that crossed kinks (float64 code only), and
    a function that gives verdicts judged after it (by the same positions) the close look's
    reasons where both still leave a coordinate undecided: what was not resolved."""
    close = np.flatnonzero((judged.status == INCONCLUSIVE) & np.array([r in CROSSING for r in judged.reasons]))
    if close.size == 0 or is_narrow(probe.compute_dtype) or probe.narrow is not None:
        return judged, lambda later: later
    looked = close_look(probe, flat[close], taken)
    decided = np.flatnonzero(looked.status != INCONCLUSIVE)

    def unresolved(later: Judged) -> Judged:
        said = np.array([r is not None for r in looked.reasons], dtype=bool)
        again = np.flatnonzero((looked.status == INCONCLUSIVE) & said & (later.status[close] == INCONCLUSIVE))
        k = close[again]
        return later.merged(k, Judged(later.status[k], later.estimate.pick(k),
                                      tuple(looked.reasons[j] for j in again.tolist()), later.noise_limited[k]))

    return judged.merged(close[decided], looked.pick(decided)), unresolved
