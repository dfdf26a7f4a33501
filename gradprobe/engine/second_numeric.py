"""The numeric side of second derivatives.

:class:`Slopes` (check 1): the derivative of the analytic gradient along a direction ``w``
is a central difference of backward, ``(g(x + h w) - g(x - h w)) / 2h``, one value per row of
the Hessian, compared with the analytic ``H w``. Two backward calls decide most rows; rows
that disagree are looked at again with a ladder of smaller steps (Richardson's estimate with
its error, the one-sided quotients on either side for kinks) before they fail.

:func:`mixed_difference` (check 2): ``u·H v`` from forward alone, as the mixed second
difference ``[f(x+hu+kv) - f(x+hu-kv) - f(x-hu+kv) + f(x-hu-kv)] / 4hk`` at three step sizes,
with an error bound from how the three disagree and from the loss's measured rounding.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..status import FAIL, INCONCLUSIVE, KINK, PASS
from .evaluate import Evaluator, Perturbation
from .probe import ROUNDING_UNITS
from .second_source import GradientField, HessianSource, Layout

UNSURE = INCONCLUSIVE  # per-row codes: the engine's codes of each Status
FLOOR_FRACTION = 1e-3  # a row's denominator never falls below 1e-3 of its tensor's scale ...
TARGET_FLOOR_FRACTION = 1e-4  # ... nor below 1e-4 of the whole column's
LADDER = (1.0, 0.5, 0.125, 0.0625)  # steps (times the first) of the two levels of rechecks
# Doubling the steps of a second difference multiplies its h**2 truncation by 4; the three
# values are trusted when successive differences grow by a ratio near that (2 to 8), or
# stay within MODEL_NOISE times the rounding.
MODEL_RATIO = (2.0, 8.0)
MODEL_NOISE = 8.0
WIDEN = 3  # times the steps of a second difference may widen fourfold


def power_of_two(value: float) -> float:
    return float(np.exp2(np.round(np.log2(value))))


@dataclass
class Along:
    """Check 1 along one direction, per row of the Hessian."""

    w: np.ndarray  # the direction really moved along (flat)
    analytic: np.ndarray  # H w
    numeric: np.ndarray  # the best numeric estimate of each row
    error: np.ndarray  # its error estimate (absolute)
    denominator: np.ndarray  # the scale each row's relative error is taken against
    code: np.ndarray  # PASS, KINK, UNSURE or FAIL per row
    backward_calls: int

    @property
    def rel(self) -> np.ndarray:
        return np.abs(self.analytic - self.numeric) / self.denominator


class Slopes:
    """Numeric derivatives of the analytic gradient along directions, against ``H w``."""

    def __init__(self, field: GradientField, source: HessianSource, g0: np.ndarray,
                 eps: float, threshold: float, jitter: np.ndarray) -> None:
        self.field, self.source, self.g0 = field, source, g0
        self.layout: Layout = field.layout
        self.eps, self.threshold, self.jitter = eps, threshold, jitter
        self.coordinate = True
        self.x = np.concatenate([field.ws.owners[n].astype(np.float64).reshape(-1)
                                 for n in self.layout.names]) if self.layout.n else np.zeros(0)

    def step(self, d: np.ndarray) -> float:
        """eps**(1/3) times the size of the moved coordinates (at least 1), a power of two
        (Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1)."""
        moved = d != 0
        size = max(1.0, float(np.max(np.abs(self.x[moved])))) if moved.any() else 1.0
        return power_of_two(self.eps ** (1.0 / 3.0) * size)

    def _noise(self, *gs: np.ndarray) -> np.ndarray:
        """Rounding noise of one gradient value per row: a few units of eps of the largest
        value seen, and backward's own measured jitter."""
        size = np.abs(self.g0)
        for g in gs:
            size = np.maximum(size, np.abs(g))
        return ROUNDING_UNITS * self.eps * size + 2.0 * self.jitter

    def _floors(self, numeric: np.ndarray) -> np.ndarray:
        tiny = float(np.finfo(np.float64).tiny)
        whole = float(np.sqrt(np.mean(numeric**2))) if numeric.size else 0.0
        out = np.empty_like(numeric)
        for name in self.layout.names:
            part = self.layout.part(name)
            rms = float(np.sqrt(np.mean(numeric[part] ** 2))) if part.stop > part.start else 0.0
            out[part] = max(FLOOR_FRACTION * rms, TARGET_FLOOR_FRACTION * whole, tiny)
        return out

    def _pair(self, d: np.ndarray, c: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """g(x + c d), g(x - c d) and the real half-span of the two moves (flat)."""
        plus, real_p = self.field.moved(c * d)
        minus, real_m = self.field.moved(-c * d)
        return self.field.at(plus), self.field.at(minus), (real_p - real_m) / 2.0

    def along(self, d: np.ndarray, coordinate: bool = True) -> Along:
        """Check every row of ``H d`` against backward's central difference along ``d``.

        Along a coordinate, a row whose one-sided slopes differ (a kink inside the step) is a
        kink when the analytic value is one side's derivative. Along a random direction several
        ReLUs may switch, on both sides, and the value at the point belongs to no side: a row
        whose slopes differ there is a kink (not judged), and columns decide."""
        self.coordinate = coordinate
        h = self.step(d)
        calls = self.field.calls
        gp, gm, half = self._pair(d, h)
        w = half / h  # the direction really moved along (rounding of x + h d)
        a = self.source.hv(w)
        numeric = (gp - gm) / (2.0 * h)
        floor = self._floors(numeric)
        den = np.maximum(np.maximum(np.abs(a), np.abs(numeric)), floor)
        tol = self.threshold * den
        err = self._noise(gp, gm) / h
        code = np.where(np.abs(a - numeric) <= tol + err, PASS, FAIL)
        best, best_err = numeric.copy(), err
        open_rows = np.flatnonzero(code == FAIL)
        if open_rows.size:
            code, best, best_err = self._recheck(d, h, a, tol, open_rows, code, best, best_err,
                                                 (gp, gm))
        den = np.maximum(np.maximum(np.abs(a), np.abs(best)), floor)
        return Along(w, a, best, best_err, den, code, self.field.calls - calls)

    def _recheck(self, d, h, a, tol, rows, code, best, best_err, first):
        """The ladder: level 1 uses steps h and h/2, level 2 h/8 and h/16. A row passes or
        is a kink at the first level that says so; it fails only when both levels say it is
        clearly off; otherwise it is inconclusive."""
        gp2, gm2, _ = self._pair(d, h * LADDER[1])
        verdicts, estimates = [], []
        levels = [(first, (gp2, gm2), h, h * LADDER[1])]
        for k, (one, two, h1, h2) in enumerate(levels):
            v, est, err = self._level(a, tol, one, two, h1, h2)
            verdicts.append(v)
            estimates.append((est.copy(), err.copy()))
            settled = rows[(v[rows] == PASS) | (v[rows] == KINK)]
            code[settled] = v[settled]
            best[rows], best_err[rows] = est[rows], err[rows]
            rows = rows[(v[rows] == FAIL) | (v[rows] == UNSURE)]
            if k == 0 and rows.size:
                three = self._pair(d, h * LADDER[2])[:2]
                four = self._pair(d, h * LADDER[3])[:2]
                levels.append((three, four, h * LADDER[2], h * LADDER[3]))
        if rows.size:
            # A failure needs both levels clearly off and their estimates in agreement: a
            # gradient that jumps inside the steps (a ReLU switching) moves the estimate
            # from level to level, and then nothing is said.
            (e1, r1), (e2, r2) = estimates[0], estimates[-1]
            stable = np.abs(e1[rows] - e2[rows]) <= r1[rows] + r2[rows] + tol[rows]
            both_fail = (verdicts[0][rows] == FAIL) & (verdicts[-1][rows] == FAIL) & stable
            code[rows] = np.where(both_fail, FAIL, UNSURE)
        return code, best, best_err

    def _level(self, a, tol, one, two, h1, h2):
        """One level of the ladder: per row a verdict, the Richardson estimate and its error."""
        (gp1, gm1), (gp2, gm2) = one, two
        g0 = self.g0
        nz = self._noise(gp1, gm1, gp2, gm2)
        d1 = (gp1 - gm1) / (2 * h1)
        d2 = (gp2 - gm2) / (2 * h2)
        est = d2 + (d2 - d1) / ((h1 / h2) ** 2 - 1)
        err = np.abs(d2 - d1) + 2 * nz / h2
        r1, r2 = (gp1 - g0) / h1, (gp2 - g0) / h2
        l1, l2 = (g0 - gm1) / h1, (g0 - gm2) / h2
        ratio = h1 / h2
        est_r, est_l = (ratio * r2 - r1) / (ratio - 1), (ratio * l2 - l1) / (ratio - 1)
        err_r = np.abs(r2 - r1) * ratio / (ratio - 1) + 4 * nz / h2
        err_l = np.abs(l2 - l1) * ratio / (ratio - 1) + 4 * nz / h2
        off = np.abs(a - est)
        plain = np.abs(a - d2) <= tol + nz / h2
        ok = (off <= tol) | plain
        side_r = (np.abs(a - est_r) <= tol + err_r) & (err_r < off)
        side_l = (np.abs(a - est_l) <= tol + err_l) & (err_l < off)
        differ = np.abs(est_r - est_l) > tol + err_r + err_l
        kink = ~ok & differ & ((side_r | side_l) | (not self.coordinate))
        ok |= ~differ & side_r & side_l
        unsure = ~ok & ~kink & (off <= tol + err)
        verdict = np.where(ok, PASS, np.where(kink, KINK, np.where(unsure, UNSURE, FAIL)))
        return verdict, est, err


@dataclass(frozen=True)
class Mixed:
    """``u·H v`` from forward's second differences, with its error bound."""

    value: float
    error: float
    evaluations: int


def mixed_difference(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                     v: np.ndarray, eps: float, noise: float, g0: np.ndarray) -> Mixed:
    """The mixed second difference of forward along ``u`` and ``v`` at three step sizes
    (12 forward calls). The first steps are eps**(1/4) times the moved coordinates' size, the
    best order for a second difference; where the function's own rounding then outweighs its
    truncation (a large loss with small curvature), the steps widen fourfold, up to WIDEN
    times, and the tightest bound is kept. The error bound is the difference of the two
    smallest steps' values (three times the smallest one's truncation when the h**2 model
    holds), the change of the Richardson estimates between step pairs, and the rounding of
    four loss values (the measured loss noise, plus what rounding the moved points changes)."""
    sizes = []
    for d in (u, v):
        moved = d != 0
        size = max(1.0, float(np.max(np.abs(x[moved])))) if moved.any() else 1.0
        sizes.append(power_of_two(eps ** 0.25 * size))
    shift_noise = eps * float(np.sum(np.abs(g0) * np.abs(x)))
    best, calls = None, 0
    for _ in range(WIDEN + 1):
        value, error, truncation, rounding = _three_steps(evaluator, layout, x, u, v, sizes,
                                                          noise + shift_noise)
        calls += 12
        if best is None or error < best[1]:
            best = (value, error)
        if not math.isfinite(error) or rounding <= MODEL_NOISE * truncation:
            break
        sizes = [4.0 * s for s in sizes]
    assert best is not None
    return Mixed(best[0], best[1], calls)


def _three_steps(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                 v: np.ndarray, sizes: list[float], noise: float) -> tuple[float, float, float, float]:
    """The Richardson value, its error bound, the truncation and rounding parts."""
    values = []
    for c in (1.0, 2.0, 4.0):
        hu, kv = c * sizes[0], c * sizes[1]
        total = 0.0
        for su, sv, sign in ((1, 1, 1.0), (1, -1, -1.0), (-1, 1, -1.0), (-1, -1, 1.0)):
            total += sign * _loss_at(evaluator, layout, x + su * hu * u + sv * kv * v)
        values.append(total / (4 * hu * kv))
    f1, f2, f4 = values
    r12, r24 = (4 * f1 - f2) / 3, (4 * f2 - f4) / 3
    rounding = noise / (sizes[0] * sizes[1])
    truncation = abs(f1 - f2) + abs(r12 - r24)
    error = truncation + 2 * rounding
    d12, d24 = f2 - f1, f4 - f2
    if max(abs(d12), abs(d24)) > MODEL_NOISE * rounding and not (
            d12 != 0 and MODEL_RATIO[0] <= d24 / d12 <= MODEL_RATIO[1]):
        error = math.inf  # the steps' values do not change as h**2 predicts (a kink of
        # forward inside the steps): no bound can be claimed
    return r12, error, truncation, rounding


def _loss_at(evaluator: Evaluator, layout: Layout, point: np.ndarray) -> float:
    ws = evaluator.loss.workspace
    moves = []
    for name in layout.names:
        owner = ws.owners[name]
        values = point[layout.part(name)].astype(owner.dtype)
        if np.array_equal(values, owner.reshape(-1)):
            continue
        moves.append(Perturbation(name, slice(0, owner.size), values))
    return float(evaluator.loss_with(moves))


def mixed_sides(evaluator: Evaluator, layout: Layout, x: np.ndarray, u: np.ndarray,
                v: np.ndarray, eps: float, noise: float, f0: float) -> bool:
    """Whether forward has a kink at the point along ``u`` or ``v``: one-sided mixed
    differences on the two sides of each (each extrapolated over three step sizes, 24
    forward calls) that differ by more than their errors. Forward's second differences say
    nothing about a Hessian there."""
    sizes = []
    for d in (u, v):
        moved = d != 0
        size = max(1.0, float(np.max(np.abs(x[moved])))) if moved.any() else 1.0
        sizes.append(power_of_two(eps ** 0.25 * size))
    f = {}
    for c in (1.0, 2.0, 4.0):
        hu, kv = c * sizes[0] * u, c * sizes[1] * v
        for su in (-1, 0, 1):
            for sv in (-1, 0, 1):
                if (su, sv) != (0, 0):
                    f[c, su, sv] = _loss_at(evaluator, layout, x + su * hu + sv * kv)
    for axis in (0, 1):
        sides = []
        for sign in (1, -1):
            values = []
            for c in (1.0, 2.0, 4.0):
                def at(a: int, b: int) -> float:
                    key = (c, a, b) if axis == 0 else (c, b, a)
                    return f0 if key[1:] == (0, 0) else f[key]
                if sign > 0:
                    q = at(1, 1) - at(1, -1) - at(0, 1) + at(0, -1)
                else:
                    q = at(0, 1) - at(0, -1) - at(-1, 1) + at(-1, -1)
                values.append(q / (2 * c * c * sizes[0] * sizes[1]))
            f1, f2, f4 = values
            e12, e24 = 2 * f1 - f2, 2 * f2 - f4
            rounding = 4 * noise / (sizes[0] * sizes[1])
            sides.append((e12, abs(f1 - f2) + abs(e12 - e24) + rounding))
        (plus, err_p), (minus, err_m) = sides
        if abs(plus - minus) > 2 * (err_p + err_m):
            return True
    return False
