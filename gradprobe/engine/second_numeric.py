"""The numeric side of second derivatives.

:class:`Slopes` (check 1): the derivative of the analytic gradient along a direction ``w``
is a central difference of backward, ``(g(x + h w) - g(x - h w)) / 2h``, one value per row of
the Hessian, compared with the analytic ``H w``. Two backward calls decide most rows; rows
that disagree are looked at again with a ladder of smaller steps (Richardson's estimate with
its error, the one-sided quotients on either side for kinks) before they fail.

Forward's side (check 2) is :mod:`.second_forward`.
"""

from __future__ import annotations


import numpy as np

from ..common.classes import dataclass
from ..common.status import FAIL, INCONCLUSIVE, KINK, PASS
from ..common.roundoff import FLOAT64_ROUNDING_UNITS as ROUNDING_UNITS  # a gradient value's rounding
from .second_source import GradientField, HessianSource, Layout

UNSURE = INCONCLUSIVE  # per-row codes: the engine's codes of each Status
FLOOR_FRACTION = 1e-3  # a row's denominator never falls below 1e-3 of its tensor's scale ...
TARGET_FLOOR_FRACTION = 1e-4  # ... nor below 1e-4 of the whole column's
LADDER = (1.0, 0.5, 0.125, 0.0625)  # steps (times the first) of the two levels of rechecks
WIDE = (8.0, 4.0)  # and of the wide level for rows the two leave undecided


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
        # The numeric value's own rounding counts in a row's favour only up to the threshold:
        # a row noisier than that is looked at again, and is inconclusive if it stays so.
        code = np.where(np.abs(a - numeric) <= tol + np.minimum(err, tol), PASS, FAIL)
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
        clearly off and agree; otherwise a wide level (8h, 4h) may pass it, or it is
        inconclusive."""
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
            rows = rows[~both_fail]
        if rows.size:
            # Rows still undecided may be drowned in rounding (an element far smaller than the
            # gradient it is the derivative of): wider steps, 4h and 8h, where rounding weighs
            # less; only a pass is taken from them.
            wide = (self._pair(d, h * WIDE[0])[:2], self._pair(d, h * WIDE[1])[:2])
            v, est, err = self._level(a, tol, wide[0], wide[1], h * WIDE[0], h * WIDE[1])
            passed = rows[v[rows] == PASS]
            code[passed] = PASS
            best[passed], best_err[passed] = est[passed], err[passed]
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
        plain = np.abs(a - d2) <= tol + np.minimum(nz / h2, tol)
        ok = (off <= tol) | plain
        side_r = (np.abs(a - est_r) <= tol + err_r) & (err_r < off)
        side_l = (np.abs(a - est_l) <= tol + err_l) & (err_l < off)
        differ = np.abs(est_r - est_l) > tol + err_r + err_l
        kink = ~ok & differ & ((side_r | side_l) | (not self.coordinate))
        ok |= ~differ & side_r & side_l
        unsure = ~ok & ~kink & (off <= tol + err)
        verdict = np.where(ok, PASS, np.where(kink, KINK, np.where(unsure, UNSURE, FAIL)))
        return verdict, est, err
