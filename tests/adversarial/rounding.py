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
