"""How far a narrow loss's rounding lets an error of the threshold's size show along one
coordinate, measured against mpmath: the loss the case's own code computes at points along the
coordinate, less the exact loss (mpmath, 50 digits) at the same points.

For an undecided coordinate of a correct target: R, the spread (largest minus smallest) of the
computed loss's error at POINTS evenly spread over the coordinate's smooth radius r on either
side (at least the computed loss's last place), is the most rounding can move a difference of
two loss values there; an error of the
threshold's size moves the widest such difference by E = threshold * max(|g|, floor) * 2r.
``ratio`` E / R below 1: no step on that range can show the error at all (the dtype's
arithmetic, not gradprobe, leaves the coordinate undecided); a ratio of a few: only an
estimate that gives rounding almost no margin could; far above: gradprobe could have decided.

That ratio takes the smooth radius as given and leaves truncation out (a kink's radius is its
smooth side's, 1 in u, whatever the kink's distance from the point). :func:`best_steps` asks
instead what the best single step does: per undecided coordinate, over steps 2**-k times the
param's scale, the larger of the exact quotient's truncation (mpmath's loss at the float32
points against mpmath's derivative) and the computed quotient's rounding (the spread of the
computed loss's error, at least its last place, at STEP_POINTS points about the point and the
step's ends, over the step's span), central or one-sided, over the protocol's tolerance: the
least such figure. Above 1 no single step resolves an error of the threshold's size, even for
an estimate that knew the exact rounding; an honest estimate needs it several times below 1.
"""

from __future__ import annotations

import mpmath as mp
import numpy as np

from .case import Case
from .reference import DPS, _values, loss_of

POINTS = 17


def rounding_spread(case: Case, ns: dict, name: str, index: tuple[int, ...], radius: float) -> float:
    """R for coordinate ``index`` of param ``name`` over ``radius`` on either side (NaN where the
    computed loss is not finite at some point)."""
    params, inputs = ns["setup"]()
    x = case.params[name]
    errors, spacing = [], 0.0
    with mp.workdps(DPS):
        V = _values(case, {})
        for t in np.linspace(-radius, radius, POINTS):
            moved = np.array(x, copy=True)
            moved[index] = (np.float64(x[index]) + t).astype(x.dtype)
            mine = dict(params)
            mine[name] = moved
            with np.errstate(all="ignore"):
                computed = float(ns["forward"](mine, inputs))
            if not np.isfinite(computed):
                return float("nan")
            spacing = max(spacing, float(np.spacing(np.abs(np.asarray(ns["forward"](mine, inputs))))))
            W = dict(V)
            W[name] = V[name].copy()
            W[name][index] = mp.mpf(float(moved[index]))
            errors.append(computed - float(loss_of(case, W)[0]))
    # Never below the computed loss's own last place: a loss that never changes along the
    # coordinate still rounds a change to it by that much.
    return max(float(max(errors) - min(errors)), spacing)


def ratios(case: Case, ns: dict, ref, floors: dict[str, float], report) -> list[tuple[str, tuple, float]]:
    """E / R for every undecided coordinate the report lists (tensor, index, ratio)."""
    out = []
    for t in report.tensors:
        if t.name not in case.params or case.params[t.name].size > 2000:
            continue
        for d in t.details:
            if str(getattr(d.status, "value", d.status)) != "inconclusive":
                continue
            index = tuple(int(i) for i in d.index)
            r = float(ref.radius[t.name][index])
            g = float(ref.grads[t.name][index])
            spread = rounding_spread(case, ns, t.name, index, r)
            effect = report.threshold * max(abs(g), floors[t.name]) * 2 * r
            out.append((t.name, index, effect / spread if spread > 0 else float("inf")))
    return out


STEP_POINTS = 3  # points about the point and either end of a step where the error is measured
STEPS = range(-22, 1)  # steps 2**k times the param's scale
MOST = 12  # undecided coordinates per target measured


def best_step(case: Case, ns: dict, name: str, index: tuple[int, ...], tol: float) -> float:
    """The best single step's error over ``tol`` for one coordinate (see the module's note);
    inf where no step gives finite losses."""
    params, inputs = ns["setup"]()
    x = case.params[name]
    x0 = float(x[index])
    scale = max(abs(x0), float(np.sqrt(np.mean(x.astype(np.float64) ** 2))) if x.size else 1.0)
    with mp.workdps(DPS):
        V = _values(case, {})

        def both(v: float) -> tuple[float, mp.mpf]:
            moved = np.array(x, copy=True)
            moved[index] = np.float32(v) if x.dtype == np.float32 else np.asarray(v, dtype=x.dtype)
            mine = dict(params)
            mine[name] = moved
            with np.errstate(all="ignore"):
                computed = float(ns["forward"](mine, inputs))
            W = dict(V)
            W[name] = V[name].copy()
            W[name][index] = mp.mpf(float(moved[index]))
            return computed, loss_of(case, W)[0]

        def exact_derivative() -> float:
            h = mp.mpf(10) ** (-DPS // 3)
            up, down = dict(V), dict(V)
            up[name], down[name] = V[name].copy(), V[name].copy()
            up[name][index] = mp.mpf(x0) + h
            down[name][index] = mp.mpf(x0) - h
            return float((loss_of(case, up)[0] - loss_of(case, down)[0]) / (2 * h))

        g = exact_derivative()
        c0, e0 = both(x0)
        best = float("inf")
        for k in STEPS:
            s = scale * 2.0**k
            xp, xm = float(np.float32(x0 + s)), float(np.float32(x0 - s))
            if xp == x0 or xm == x0:
                continue
            (cp, ep), (cm, em) = both(xp), both(xm)
            if not (np.isfinite(cp) and np.isfinite(cm) and np.isfinite(c0)):
                continue
            errors = []
            for centre in (x0, xp, xm):
                for j in range(STEP_POINTS):
                    c, e = both(centre + (j - (STEP_POINTS - 1) / 2) * s / 64)
                    errors.append(c - float(e))
            spread = max(max(errors) - min(errors), float(np.spacing(np.float32(abs(c0)))))
            hp, hm = xp - x0, x0 - xm
            for trunc, span in ((float((ep - em) / (hp + hm)) - g, hp + hm),
                                (float((ep - e0) / hp) - g, hp), (float((e0 - em) / hm) - g, hm)):
                best = min(best, max(abs(trunc), spread / span) / tol)
    return best


def best_steps(case: Case, ns: dict, ref, floors: dict[str, float], report) -> list[tuple[str, tuple, float]]:
    """:func:`best_step` for the first MOST undecided coordinates the report lists."""
    out = []
    for t in report.tensors:
        if t.name not in case.params or case.params[t.name].size > 2000:
            continue
        for d in t.details:
            if str(getattr(d.status, "value", d.status)) != "inconclusive" or len(out) >= MOST:
                continue
            index = tuple(int(i) for i in d.index)
            g = float(ref.grads[t.name][index])
            tol = report.threshold * max(abs(g), floors[t.name])
            out.append((t.name, index, best_step(case, ns, t.name, index, tol)))
    return out
