"""A gradient exactly zero throughout whose numeric value is exactly 0 only because the loss
did not change at the steps taken: a derivative too small for them, or none at all?

Float64 code. A term whose derivative is ~1e-11 of the loss's other terms' moves the loss by
less than its rounding at the ordinary steps, so the numeric value reads exactly 0 and a
backward that leaves that term's gradient out agrees with it. So too where the numeric value
is not 0 but not resolved either (within SIGNIFICANCE of its bound: a change of a few
rounding units at the first step) and passed on the target's floor. Steps up to the params' own
scale (max(|x|, the tensor's rms), as :func:`.reconcile._changes_through` widens) show
whether the loss changes: at the largest, in one pair per coordinate; where it does, a
ladder of steps shrinking RATIO-fold down to where the loss is flat again. A derivative
resolved at the point shows as a slope: at two neighbouring steps the loss changes on both
sides alike (same sign, the smaller ALIKE of the larger), by at least RESOLVED units of its
rounding at the larger step, the two central differences agreeing to AGREE (and rounding);
and at every smaller step each side's change is that slope times the step, to UNITS units
of rounding and AGREE of the prediction, down to the flat steps (where the slope predicts a
few units at most). A loss that ignores the param never changes; one flat up to a kink (a
unit switched off) changes on one side only, or, with kinks on both sides, by changes not
proportional to the step (flat below the kink where the slope predicts many units); a
derivative truly 0 with curvature changes on opposite sides (an extremum) or by the cube
of the step (an inflection): none of them shows a slope, and their passes stand.

A slope found fails the coordinate where it is resolved (beyond SIGNIFICANCE bounds) and
beyond the threshold at the tensor's own scale, as :func:`.reconcile.zero_at_own_scale`
judges a gradient left out.
"""

from __future__ import annotations

import numpy as np

from ..common.status import FAIL, PASS
from .probe import FLOOR_FRACTION, TensorProbe
from .steep_noise import chain_estimate
from .verdict import SIGNIFICANCE
from .widened import root_mean_square

RATIO = 4.0  # each step of the ladder this many times smaller than the one above
LEVELS = 40  # steps at most below the params' scale (4**-40: far below any flat step)
RESOLVED = 16.0  # the larger of two steps changes the loss by this many rounding units
ALIKE = 0.5  # both sides' changes: the smaller at least this share of the larger
AGREE = 0.1  # relative agreement of the slopes (and of each change with its prediction)
UNITS = 4.0  # rounding units of the loss each change may miss its prediction by
EDGE_MARGIN = 2.0  # below a domain edge, the chain starts this many times below the widest finite step


def moved_at_own_scale(
    probe: TensorProbe, flat: np.ndarray, a: np.ndarray, numeric: np.ndarray,
    error: np.ndarray, status: np.ndarray, scale: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per the module's note: the passes of a gradient exactly zero throughout read off a loss
    that did not change (numeric exactly 0) or changed by too little to resolve, looked at
    with steps up to the params' own scale. Returns (numeric, error, status, scale), those of coordinates that show a slope
    replaced by it (its bound, a failure where resolved at the tensor's own scale)."""
    unresolved = (numeric == 0.0) | ~(np.abs(numeric) > SIGNIFICANCE * error)
    if (probe.compute_dtype != np.dtype(np.float64) or probe.narrow is not None or np.any(a)
            or not np.any(unresolved)):
        return numeric, error, status, scale
    todo = np.flatnonzero((status == PASS) & unresolved)
    size = np.maximum(np.abs(probe.x[flat[todo]].astype(np.float64)), probe.x_scale)
    todo, size = todo[(size > 0) & np.isfinite(size)], size[(size > 0) & np.isfinite(size)]
    if todo.size == 0:
        return numeric, error, status, scale
    unit = probe.eps * probe.loss_scale
    first = probe.pairs(flat[todo], size)  # does the loss change at all within the scale?
    moved = (first.f_plus != probe.f0) | (first.f_minus != probe.f0)
    todo, size = todo[moved], size[moved]
    if todo.size == 0:
        return numeric, error, status, scale
    first_up, first_down = first.f_plus[moved] - probe.f0, probe.f0 - first.f_minus[moved]
    slope, bound, seen_at = _slopes(probe, flat[todo], size, unit, (first_up, first_down,
                                    first.h_plus[moved], first.h_minus[moved]))
    # A domain edge within the params' scale (a log's pole 2.5e-4 away) shrank the first pair:
    # no ladder from there. The chain of halving steps on the rounding measured along the
    # coordinate (steep_noise.chain_estimate) starts EDGE_MARGIN times below the step at which
    # the loss was finite on both sides.
    h_plus, h_minus = first.h_plus[moved], first.h_minus[moved]
    edge = np.flatnonzero(~np.isfinite(slope) & ((np.abs(h_plus - size) > 1e-6 * size)
                                                 | (np.abs(h_minus - size) > 1e-6 * size)))
    if edge.size:
        top = np.minimum(h_plus[edge], h_minus[edge]) / EDGE_MARGIN
        chain = chain_estimate(probe, flat[todo[edge]], top)
        seen = np.isfinite(chain.error)
        slope[edge[seen]], bound[edge[seen]] = chain.value[seen], chain.error[seen]
    found = np.isfinite(slope)
    # A slope its ladder shows but whose bound (rounding taken as UNITS units of eps |f|)
    # does not resolve: the chain of halving steps with the rounding measured along it
    # (steep_noise.chain_estimate), from the params' scale and then from the larger step of
    # the pair that showed the slope (a steep coordinate bends at every step of the first
    # chain; a slope found below a domain edge has no such step), where one bounds it more
    # tightly.
    weak = np.flatnonzero(found & ~(np.abs(slope) > SIGNIFICANCE * bound))
    for tops in (size, seen_at):
        weak = weak[np.isfinite(tops[weak]) & ~(np.abs(slope[weak]) > SIGNIFICANCE * bound[weak])]
        if weak.size == 0:
            break
        chain = chain_estimate(probe, flat[todo[weak]], tops[weak])
        better = np.isfinite(chain.error) & (chain.error < bound[weak])
        slope[weak[better]], bound[weak[better]] = chain.value[better], chain.error[better]
    if not found.any():
        return numeric, error, status, scale
    k = todo[found]
    numeric, error, status, scale = numeric.copy(), error.copy(), status.copy(), scale.copy()
    numeric[k], error[k] = slope[found], bound[found]
    own = max(probe.tensor_floor, FLOOR_FRACTION * root_mean_square(numeric))
    mine = np.maximum(np.abs(numeric[k]), min(own, probe.floor))
    beyond = (np.abs(numeric[k]) > probe.threshold * mine) & (np.abs(numeric[k]) > SIGNIFICANCE * error[k])
    status[k[beyond]] = FAIL
    scale[k] = np.where(beyond, mine, probe.denominators(flat[k], numeric[k]))
    return numeric, error, status, scale


def _slopes(probe: TensorProbe, flat: np.ndarray, size: np.ndarray, unit: float,
            largest: tuple[np.ndarray, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per coordinate the slope the ladder shows (module's note), its bound (the two
    slopes' difference plus rounding) and the larger of the two steps that showed it, NaN
    where it shows none. ``largest``: the changes up and down at the largest step and the
    distances moved, taken already."""
    n = flat.size
    rows = [np.full((LEVELS + 1, n), np.nan) for _ in range(4)]  # up, down, h_plus, h_minus
    steps = size[None, :] * RATIO ** -np.arange(LEVELS + 1)[:, None]
    live = np.ones(n, dtype=bool)
    for level in range(LEVELS + 1):
        which = np.flatnonzero(live)
        if which.size == 0:
            break
        if level == 0:
            got = largest
        else:
            p = probe.pairs(flat[which], steps[level, which])
            got = (p.f_plus - probe.f0, probe.f0 - p.f_minus, p.h_plus, p.h_minus)
        wanted = steps[level, which]
        # a domain edge shrank the step: no ladder to read
        exact = (np.abs(got[2] - wanted) <= 1e-6 * wanted) & (np.abs(got[3] - wanted) <= 1e-6 * wanted)
        live[which[~exact]] = False
        for row, value in zip(rows, got):
            row[level, which[exact]] = value[exact]
        live[which[exact & (got[0] == 0.0) & (got[1] == 0.0)]] = False  # flat from here down
    slope, bound, seen_at = np.full(n, np.nan), np.full(n, np.nan), np.full(n, np.nan)
    for i in range(n):
        up, down, h_plus, h_minus = (row[:, i] for row in rows)
        slope[i], bound[i], seen_at[i] = _one(up, down, h_plus, h_minus, unit)
    return slope, bound, seen_at


def _one(up: np.ndarray, down: np.ndarray, h_plus: np.ndarray, h_minus: np.ndarray,
         unit: float) -> tuple[float, float, float]:
    """One coordinate's ladder (NaN past its last step): of the pairs of neighbouring steps
    showing a slope that every finer step bears out, the one with the tightest bound (its
    slope, bound and larger step)."""
    last = int(np.sum(np.isfinite(up))) - 1
    if last < 1 or not (up[last] == 0.0 and down[last] == 0.0):
        return np.nan, np.nan, np.nan  # the ladder stopped before the loss was flat again
    steps = 0.5 * (h_plus + h_minus)
    central = (up + down) / (h_plus + h_minus)
    small, large = np.minimum(np.abs(up), np.abs(down)), np.maximum(np.abs(up), np.abs(down))
    alike = (up * down > 0) & (small >= ALIKE * large)
    best = (np.nan, np.inf, np.nan)
    for j in range(last - 1, 0, -1):  # j the finer step, j - 1 the larger
        if not (alike[j] and alike[j - 1] and small[j - 1] >= RESOLVED * unit):
            continue
        rounding = 2 * UNITS * unit / steps[j]
        apart = abs(central[j - 1] - central[j])
        if apart > AGREE * abs(central[j]) + rounding:
            continue
        g = central[j]
        finer = slice(j + 1, last + 1)
        rise, fall = g * h_plus[finer], g * h_minus[finer]
        if (np.all(np.abs(up[finer] - rise) <= UNITS * unit + AGREE * np.abs(rise))
                and np.all(np.abs(down[finer] - fall) <= UNITS * unit + AGREE * np.abs(fall))
                and apart + rounding < best[1]):
            best = (float(g), float(apart + rounding), float(steps[j - 1]))
    return best if np.isfinite(best[1]) else (np.nan, np.nan, np.nan)
