"""The reference: the same expression evaluated in mpmath at 50 digits on the exact values of
the case's arrays (float16/32/64 values convert to mpf exactly).

- ``grads``: the exact derivative expressions (the pieces' mpmath derivatives and the chain
  rule written out again, independently of the numpy source), at 50 digits;
- ``check_with_diff``: mpmath's own numerical differentiation (``mp.diff``, at 50 digits with a
  step of 1e-25 of the param's scale) of the mpmath loss along a few coordinates, which must
  agree with ``grads`` to 1e-15: this verifies the generator's derivative formulas themselves.

Large tensors (more than ``FULL`` elements) are evaluated on a subset of elements only; their
terms are elementwise (``map``), so each element's gradient is exact on its own.
"""

from __future__ import annotations

from dataclasses import dataclass

import mpmath as mp
import numpy as np

from .case import Case, Term
from .ops import PIECES

DPS = 50
FULL = 2000

_to_mp_each = np.vectorize(lambda x: mp.mpf(float(x)), otypes=[object])


def _to_mp(a) -> np.ndarray:
    return np.asarray(_to_mp_each(np.asarray(a)), dtype=object).reshape(np.shape(a))
_to_float = np.vectorize(lambda x: float(x), otypes=[np.float64])


def _f(op: str):
    return np.frompyfunc(PIECES[op].mp_value, 1, 1)


def _d(op: str):
    return np.frompyfunc(PIECES[op].mp_deriv, 1, 1)


@dataclass
class Reference:
    grads: dict[str, np.ndarray]  # float64, full shape; NaN where not evaluated (large tensors)
    evaluated: dict[str, np.ndarray]  # flat indices evaluated per tensor
    loss: float
    magnitude: float  # |S| * sum of |summands| (times |T| for a squared total): the loss's rounding scale
    radius: dict[str, np.ndarray]  # per element, how far (in the param's units) the loss stays smooth
    mags: dict = None  # per element, the size of the intermediate products its gradient sums
    condition: float = 1.0  # a squared total: sum |summands| / |T|, how much T's rounding grows relatively


def _term(t: Term, V: dict, grads: dict, mags: dict) -> tuple:
    """(sum, sum of |summands|) of one term; adds its gradient into ``grads`` and the size of
    its intermediate products (where a formula's rounding is absolute) into ``mags``."""
    j = t.j
    one = mp.mpf(1)
    if t.kind == "map":
        u = V[f"a{j}"] * (V[t.p] - V[f"k{j}"])
        v = _f(t.op)(u)
        d = _d(t.op)(u)
        size = np.abs(d) + one
        if t.op2:
            size = size * (np.abs(_d(t.op2)(v)) + one)
            d = d * _d(t.op2)(v)
            v = _f(t.op2)(v)
        s = V[f"w{j}"] * v
        grads[t.p] = grads[t.p] + V[f"w{j}"] * d * V[f"a{j}"]
        mags[t.p] = mags[t.p] + np.abs(V[f"w{j}"] * V[f"a{j}"]) * size
    elif t.kind == "pair":
        u = V[f"a{j}"] * (V[t.p] - V[f"k{j}"])
        v = V[f"b{j}"] * (V[t.q] - V[f"m{j}"])
        fu, gv = _f(t.op)(u), _f(t.qop)(v)
        s = V[f"w{j}"] * fu * gv
        grads[t.p] = grads[t.p] + V[f"w{j}"] * _d(t.op)(u) * gv * V[f"a{j}"]
        dq = V[f"w{j}"] * fu * _d(t.qop)(v) * V[f"b{j}"]
        grads[t.q] = grads[t.q] + (np.sum(dq) if np.ndim(V[t.q]) == 0 else dq)
        sp = np.abs(V[f"w{j}"] * V[f"a{j}"]) * (np.abs(_d(t.op)(u)) + one) * (np.abs(gv) + one)
        sq = np.abs(V[f"w{j}"] * V[f"b{j}"]) * (np.abs(fu) + one) * (np.abs(_d(t.qop)(v)) + one)
        mags[t.p] = mags[t.p] + sp
        mags[t.q] = mags[t.q] + (np.sum(sq) if np.ndim(V[t.q]) == 0 else sq)
    elif t.kind == "max":
        first = np.vectorize(lambda a, b: a >= b, otypes=[bool])(V[t.p], V[t.q])
        s = V[f"w{j}"] * np.where(first, V[t.p], V[t.q])
        zero = mp.mpf(0)
        grads[t.p] = grads[t.p] + np.where(first, V[f"w{j}"], zero)
        grads[t.q] = grads[t.q] + np.where(first, zero, V[f"w{j}"])
    elif t.kind in ("matmul", "resid"):
        z = V[f"X{j}"] @ V[t.p] - (V[f"k{j}"] if t.kind == "resid" else 0)
        s = V[f"w{j}"] * _f(t.op)(z)
        grads[t.p] = grads[t.p] + V[f"X{j}"].T @ (V[f"w{j}"] * _d(t.op)(z))
        mags[t.p] = mags[t.p] + np.abs(V[f"X{j}"]).T @ (np.abs(V[f"w{j}"]) * (np.abs(_d(t.op)(z)) + one))
    else:
        raise ValueError(t.kind)
    flat = list(np.asarray(s, dtype=object).reshape(-1))
    return sum(flat, mp.mpf(0)), sum((abs(x) for x in flat), mp.mpf(0))


def _values(case: Case, subset: dict[str, np.ndarray]) -> dict:
    """mpf object arrays of every param and input, big tensors (and their inputs) cut to ``subset``."""
    shapes = {n: a.shape for n, a in case.params.items()}
    V = {}
    for name, a in list(case.params.items()) + list(case.inputs.items()):
        big = next((p for p in subset if a.shape == shapes[p] and a.size > FULL), None)
        V[name] = _to_mp(a.reshape(-1)[subset[big]] if big else a)
    return V


def loss_of(case: Case, V: dict) -> tuple:
    grads = {n: np.full(V[n].shape, mp.mpf(0), dtype=object) for n in case.params}
    mags = {n: np.full(V[n].shape, mp.mpf(0), dtype=object) for n in case.params}
    total, size = mp.mpf(0), mp.mpf(0)
    for t in case.terms:
        s, m = _term(t, V, grads, mags)
        total, size = total + s, size + m
    S = mp.mpf(case.scale)
    o = S * total if case.outer == "sq" else S
    grads = {n: np.asarray(g * o, dtype=object).reshape(np.shape(g)) for n, g in grads.items()}
    mags = {n: np.asarray(m * abs(o), dtype=object).reshape(np.shape(m)) for n, m in mags.items()}
    loss = S * total * total / 2 if case.outer == "sq" else S * total
    condition = size / abs(total) if case.outer == "sq" and total else mp.mpf(1)
    return loss, o, abs(o) * size, grads, condition, mags


def _radius(case: Case) -> dict[str, np.ndarray]:
    """Per element, in the param's units: how far the loss stays smooth along that coordinate."""
    out = {}
    for name, p in case.params.items():
        scale = float(np.sqrt(np.mean(p.astype(np.float64) ** 2))) if p.size else 1.0
        out[name] = np.full(p.shape, max(scale, np.abs(p).max(initial=0.0)), dtype=np.float64)
    for t in case.terms:
        j = t.j
        if t.kind in ("map", "pair"):
            a, k = (case.inputs[f"{c}{j}"].astype(np.float64) for c in "ak")
            u = a * (case.params[t.p].astype(np.float64) - k)
            out[t.p] = np.minimum(out[t.p], PIECES[t.op].radius(u) / np.maximum(np.abs(a), 1e-300))
        if t.kind in ("matmul", "resid"):
            X = np.abs(case.inputs[f"X{j}"].astype(np.float64)).max(axis=0)
            out[t.p] = np.minimum(out[t.p], 1 / np.maximum(X, 1e-300)[:, None])
    return out


def reference(case: Case, subset: dict[str, np.ndarray] | None = None) -> Reference:
    """The mpmath gradient of every element (of ``subset``'s flat indices for big tensors)."""
    subset = dict(subset or {})
    for name, p in case.params.items():
        if p.size > FULL and name not in subset:
            raise ValueError(f"{name} has {p.size} elements: give the subset to evaluate")
    with mp.workdps(DPS):
        V = _values(case, subset)
        loss, _, magnitude, grads, condition, sizes = loss_of(case, V)
        out, evaluated, mags = {}, {}, {}
        for name, p in case.params.items():
            g, m = np.full(p.size, np.nan), np.full(p.size, np.nan)
            idx = subset[name] if name in subset else np.arange(p.size)
            g[idx] = _to_float(np.asarray(grads[name], dtype=object).reshape(-1))
            m[idx] = _to_float(np.asarray(sizes[name], dtype=object).reshape(-1))
            out[name], evaluated[name], mags[name] = g.reshape(p.shape), idx, m.reshape(p.shape)
        scale_up = 1.0
        if subset:  # the magnitude of a cut tensor's terms: scaled up from the subset
            big = max(subset, key=lambda n: case.params[n].size)
            scale_up = case.params[big].size / max(1, len(subset[big]))
        return Reference(out, evaluated, float(loss), float(magnitude) * scale_up, _radius(case), mags, float(condition))


def check_with_diff(case: Case, ref: Reference, rng: np.random.Generator, count: int = 2) -> list[str]:
    """Compare ``ref.grads`` with mp.diff of the mpmath loss on ``count`` coordinates away from
    placed kinks; returns disagreements (empty when the generator's formulas are right)."""
    placed = {(n, i) for n, i, _ in case.kinks}
    problems = []
    with mp.workdps(DPS):
        V = _values(case, {})
        names = [n for n, p in case.params.items() if 0 < p.size <= FULL]
        for _ in range(count if names else 0):
            name = names[rng.integers(len(names))]
            p = case.params[name]
            index = np.unravel_index(rng.integers(p.size), p.shape)
            if (name, tuple(int(i) for i in index)) in placed:
                continue
            x0 = V[name][index]
            scale = abs(x0) or mp.mpf(ref.radius[name][index])

            def along(x, name=name, index=index):
                W = dict(V)
                W[name] = V[name].copy()
                W[name][index] = x
                return loss_of(case, W)[0]

            numeric = mp.diff(along, x0, h=scale * mp.mpf(10) ** -25)
            exact = mp.mpf(ref.grads[name][index])
            tiny = mp.mpf(10) ** -15 * (abs(exact) + abs(ref.loss) / scale + mp.mpf(10) ** -300)
            if abs(numeric - exact) > tiny:
                problems.append(f"{name}{tuple(int(i) for i in index)}: formula {exact} vs mp.diff {numeric}")
    return problems
