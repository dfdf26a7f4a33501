"""Random adversarial cases per category, from ``(category, seed)`` alone.

Categories (each draws its own scales, shapes, dtype and bug):

- ``steep``: exp of large arguments, 1/(1 - u) near its pole, log near 0, powers 5..12,
  softplus(k u)/k with k up to 1e4; gains of 1 to 1e3 over the param's scale;
- ``kinks``: abs, relu, max ties and Huber corners placed 0, 1e-12 .. 1e-2 of the param's
  scale from the point;
- ``scales``: params and losses over twelve decades (1e-6 .. 1e6), smooth pieces, pairs,
  matmuls, a squared total;
- ``shapes``: 0-d, (1,), size-1 axes, empty, Fortran, strided, reversed and broadcast-view
  params, a 0-d param broadcast against a vector;
- ``float32``, ``float32only`` (every array and the loss cast with np.float32: no wider run),
  ``float16``; ``inside16`` (by name only: float64 or float32 arrays, every one cast to
  bfloat16 or float16 inside, the loss and gradients cast back: no wider run);
  ``float32back`` (by name only: float32 arrays, forward computing in whatever type it is
  given, backward returning float32 whatever it is given: a wider run of forward only);
- ``large``: one tensor of 20,000 .. 100,000 elements, correct or with one element 0.1%, 1%
  or 20% off.
"""

from __future__ import annotations

import numpy as np

from .case import Bug, Case, Term
from .ops import KINKED, SMOOTH, STEEP, domain

CATEGORIES = ("steep", "kinks", "scales", "shapes", "float32", "float32only", "float16", "large")
# Run by name only (``--categories inside16``), so that the default run's figures stay
# comparable: code casting every array to bfloat16 or float16 inside while its arrays are
# float64 or float32 (no wider run).
EXTRA_CATEGORIES = ("inside16", "float32back")
ALL_CATEGORIES = CATEGORIES + EXTRA_CATEGORIES
DISTANCES = (0.0, 1e-12, 1e-10, 1e-8, 1e-7, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2)
SHAPES = ((), (1,), (1, 1, 3), (1, 4, 1), (0,), (2, 0), (5,), (3, 4), (4, 3), (2, 3, 2))


class Builder:
    def __init__(self, category: str, seed: int, dtype: str, flavor: str = "generic"):
        self.rng = np.random.default_rng([ALL_CATEGORIES.index(category), seed])
        self.category, self.seed, self.dtype, self.flavor = category, seed, dtype_of(dtype), flavor
        self.params: dict[str, np.ndarray] = {}
        self.layouts: dict[str, str] = {}
        self.inputs: dict[str, np.ndarray] = {}
        self.terms: list[Term] = []
        self.kinks: list = []
        self.scales: dict[str, float] = {}

    def cast(self, a) -> np.ndarray:
        return np.asarray(a, dtype=np.float64).astype(self.dtype)

    def param(self, shape, scale: float, layout: str = "c", offset: float = 0.0) -> str:
        """A param of ``shape`` whose values vary on ``scale`` around ``offset``."""
        name = f"p{len(self.params)}"
        values = scale * self.rng.normal(size=shape) * self.rng.choice([1, -1])
        if values.ndim:
            values = np.where(np.abs(values) < 0.05 * scale, 0.7 * scale, values)
        values = values + offset
        if layout == "broadcast" and values.ndim and values.shape[0]:
            values = np.broadcast_to(values[:1], values.shape).copy()
        self.params[name], self.layouts[name], self.scales[name] = self.cast(values), layout, scale
        return name

    def _ak(self, j: int, p: str, op: str, gain: float, letters: str = "ak") -> np.ndarray:
        """Inputs ``a``, ``k`` that put ``u = a * (p - k)`` in the piece's domain; returns a."""
        x = self.params[p].astype(np.float64)
        a = self.cast(gain * self.rng.uniform(0.5, 1.5, x.shape) / self.scales[p] * self.rng.choice([1, -1]))
        u = domain(op, self.rng, x.size, self._gain_of_exp(), self.dtype.name).reshape(x.shape)
        self.inputs[f"{letters[0]}{j}"] = a
        self.inputs[f"{letters[1]}{j}"] = self.cast(x - u / a.astype(np.float64))
        return a

    def _gain_of_exp(self) -> float:
        return {"float16": 3.0, "bfloat16": 3.0, "float32": 12.0}.get(self.dtype.name, 40.0)

    def weights(self, j: int, shape) -> None:
        self.inputs[f"w{j}"] = self.cast(self.rng.uniform(-1, 1, shape))

    def map(self, p: str, op: str, op2: str | None = None, gain: float = 1.0) -> Term:
        j = len(self.terms)
        self._ak(j, p, op, gain)
        self.weights(j, self.params[p].shape)
        self.terms.append(Term("map", j, p, op, op2))
        return self.terms[-1]

    def pair(self, p: str, q: str, op: str, qop: str, gain: float = 1.0) -> Term:
        j = len(self.terms)
        self._ak(j, p, op, gain)
        shape = self.params[p].shape
        qv = self.params[q].astype(np.float64)
        b = self.cast(self.rng.uniform(0.5, 1.5, shape) / self.scales[q])
        v = domain(qop, self.rng, int(np.prod(shape)), 1.0, self.dtype.name).reshape(shape)
        shift = v / b.astype(np.float64)
        m = (qv - (shift.mean() if shift.size else 0.0)) if qv.ndim == 0 else qv - shift
        self.inputs[f"b{j}"], self.inputs[f"m{j}"] = b, self.cast(m)
        self.weights(j, shape)
        self.terms.append(Term("pair", j, p, op, None, q, qop))
        return self.terms[-1]

    def matmul(self, p: str, op: str, rows: int) -> Term:
        j = len(self.terms)
        n = self.params[p].shape[0]
        self.inputs[f"X{j}"] = self.cast(self.rng.normal(size=(rows, n)) / (np.sqrt(n) * self.scales[p]))
        self.weights(j, (rows, self.params[p].shape[1]))
        self.terms.append(Term("matmul", j, p, op))
        return self.terms[-1]

    def residual(self, n: int, op: str, rows: int, scale: float, share: float) -> Term:
        """``sum(w * f(X @ W - k))`` with X small integers and W on a 2^-6 grid of its scale, so
        X @ W is exact at the point; a ``share`` of the residuals is placed at a distance from
        ``DISTANCES`` (times the scale) from the kink: an absolute-error loss whose residuals
        sit near zero, its kinks cutting every coordinate of a column."""
        j, rng = len(self.terms), self.rng
        step = 2.0 ** np.round(np.log2(scale))
        name = f"p{len(self.params)}"
        W = np.round(rng.normal(size=(n, n)) * 64) / 64 * step
        self.params[name], self.layouts[name], self.scales[name] = self.cast(W), "c", step
        X = rng.integers(-3, 4, size=(rows, n)).astype(np.float64)
        z = X @ self.params[name].astype(np.float64)
        at = 1.0 if op == "hub" else 0.0
        d = rng.choice(DISTANCES, size=z.shape) * rng.choice([1, -1], size=z.shape) * step
        placed = rng.random(z.shape) < share
        k = np.where(placed, z - at - d, z - rng.uniform(-2, 2, z.shape) * step)
        self.inputs[f"X{j}"], self.inputs[f"k{j}"] = self.cast(X), self.cast(k)
        self.weights(j, z.shape)
        self.terms.append(Term("resid", j, name, op))
        for r, c in zip(*np.nonzero(placed)):
            self.kinks += [(name, (i, int(c)), float(abs(d[r, c]) / step)) for i in range(n)]
        return self.terms[-1]

    def place_kink(self, term: Term, count: int = 1) -> None:
        """Move ``count`` elements of the term's param to a placed distance from its kink."""
        p = self.params[term.p]
        if not p.size or self.layouts[term.p] == "broadcast":
            return
        k = self.inputs[f"k{term.j}"]
        a = self.inputs[f"a{term.j}"].astype(np.float64)
        for flat in self.rng.choice(p.size, size=min(count, p.size), replace=False):
            index = np.unravel_index(flat, p.shape)
            d = float(self.rng.choice(DISTANCES)) * self.rng.choice([1, -1])
            x = float(p[index])
            at = 1.0 * np.sign(self.rng.normal()) if term.op == "hub" else 0.0
            # u = a (x - k) = at + a d scale  <=>  k = x - (at / a + d scale)
            k[index] = self.cast(x - (at / a[index] + d * self.scales[term.p]))
            self.kinks.append((term.p, tuple(int(i) for i in index), abs(d)))

    def tie(self, p: str, q: str, count: int = 2) -> None:
        """Max ties: ``count`` elements of q set to p's value (or a placed distance below/above)."""
        pv, qv = self.params[p], self.params[q]
        for flat in self.rng.choice(pv.size, size=min(count, pv.size), replace=False):
            index = np.unravel_index(flat, pv.shape)
            d = float(self.rng.choice(DISTANCES)) * self.rng.choice([1, -1])
            qv[index] = self.cast(float(pv[index]) - d * self.scales[p])
            self.kinks.append((p, tuple(int(i) for i in index), abs(d)))
            self.kinks.append((q, tuple(int(i) for i in index), abs(d)))

    def case(self, scale: float, outer: str = "id") -> Case:
        s = float(self.cast(scale))
        return Case(self.category, self.seed, self.dtype.name, self.flavor, self.params, self.layouts,
                    self.inputs, self.terms, s, outer, None, self.kinks)


def _decade(rng, lo: float, hi: float) -> float:
    return float(10 ** rng.uniform(lo, hi))


def _shape(rng, small: bool = False) -> tuple:
    shapes = ((3,), (5,), (2, 3), (4,), (3, 3)) if small else ((4,), (7,), (3, 4), (4, 4), (2, 3, 2))
    return shapes[rng.integers(len(shapes))]


def _steep(b: Builder) -> Case:
    rng = b.rng
    for _ in range(rng.integers(1, 4)):
        p = b.param(_shape(rng), _decade(rng, -3, 3))
        r = rng.random()
        if r < 0.15:  # oscillating: every derivative grows like gain^n
            b.map(p, "sin", gain=_decade(rng, 1, 4))
        elif r < 0.3:
            q = b.param(b.params[p].shape, _decade(rng, -3, 3))
            b.pair(p, q, str(rng.choice(STEEP)), str(rng.choice(SMOOTH)), gain=_decade(rng, 0, 3))
        else:
            b.map(p, str(rng.choice(STEEP)), gain=_decade(rng, 0, 5))
    if rng.random() < 0.4:
        b.map(b.param(_shape(rng), _decade(rng, -3, 3)), str(rng.choice(SMOOTH)))
    return b.case(_decade(rng, -3, 3), "sq" if rng.random() < 0.2 else "id")


def _kinks(b: Builder) -> Case:
    rng = b.rng
    for _ in range(rng.integers(1, 4)):
        scale, r = _decade(rng, -3, 3), rng.random()
        if r < 0.25:
            p = b.param(_shape(rng), scale)
            q = b.param(b.params[p].shape, scale)
            b.weights(len(b.terms), b.params[p].shape)
            b.terms.append(Term("max", len(b.terms), p, q=q))
            b.tie(p, q, int(rng.integers(1, 4)))
        elif r < 0.6:
            b.residual(int(rng.integers(2, 5)), str(rng.choice(("abs", "abs", "relu", "hub"))),
                       int(rng.integers(2, 30)), scale, float(rng.choice([0.1, 0.5, 1.0])))
        else:
            p = b.param(_shape(rng), scale)
            t = b.map(p, str(rng.choice(KINKED)), gain=_decade(rng, 0, 1))
            b.place_kink(t, int(rng.integers(1, b.params[p].size + 1)))
    if rng.random() < 0.5:
        b.map(b.param(_shape(rng), _decade(rng, -3, 3)), str(rng.choice(SMOOTH)))
    return b.case(_decade(rng, -3, 3))


def _smooth_terms(b: Builder, lo: float, hi: float, small: bool = False) -> None:
    rng = b.rng
    for _ in range(rng.integers(1, 4)):
        kind = rng.choice(["map", "map", "pair", "matmul"])
        if kind == "matmul":
            n = int(rng.integers(2, 5))
            b.matmul(b.param((n, n), _decade(rng, lo, hi)), str(rng.choice(SMOOTH)), int(rng.integers(1, 4)))
        elif kind == "pair":
            p = b.param(_shape(rng, small), _decade(rng, lo, hi))
            q = b.param(() if rng.random() < 0.5 else b.params[p].shape, _decade(rng, lo, hi))
            b.pair(p, q, str(rng.choice(SMOOTH)), str(rng.choice(SMOOTH)))
        else:
            op2 = str(rng.choice(SMOOTH)) if rng.random() < 0.4 else None
            b.map(b.param(_shape(rng, small), _decade(rng, lo, hi)), str(rng.choice(SMOOTH)), op2)


def _scales(b: Builder) -> Case:
    _smooth_terms(b, -6, 6)
    if b.rng.random() < 0.5:  # a param far from 0 whose loss varies on a much smaller scale
        scale = _decade(b.rng, -6, 6)
        offset = scale * _decade(b.rng, 0, 6) * b.rng.choice([1, -1])
        b.map(b.param(_shape(b.rng), scale, offset=offset), str(b.rng.choice(SMOOTH)))
    return b.case(_decade(b.rng, -6, 6), "sq" if b.rng.random() < 0.3 else "id")


def _shapes(b: Builder) -> Case:
    rng = b.rng
    for _ in range(rng.integers(1, 4)):
        shape = SHAPES[rng.integers(len(SHAPES))]
        layouts = ["c"] + (["fortran", "strided", "reversed"] if len(shape) else []) + (
            ["broadcast"] if len(shape) >= 2 and shape[0] > 1 else [])
        p = b.param(shape, _decade(rng, -2, 2), str(rng.choice(layouts)))
        r = rng.random()
        if r < 0.25:
            b.pair(p, b.param((), _decade(rng, -2, 2)), str(rng.choice(SMOOTH)), str(rng.choice(SMOOTH)))
        elif r < 0.45:
            b.place_kink(b.map(p, str(rng.choice(KINKED))), 1)
        else:
            b.map(p, str(rng.choice(SMOOTH + ("exp", "pow5"))))
    return b.case(_decade(rng, -2, 2))


def _low(b: Builder) -> Case:
    rng = b.rng
    sixteen = b.dtype.name in ("float16", "bfloat16")
    lo, hi = (-1, 1) if sixteen else (-2, 2)
    pieces = SMOOTH + ("exp",) if sixteen else SMOOTH + ("exp", "pow5", "sp100")
    for _ in range(rng.integers(1, 4)):
        r = rng.random()
        if r < 0.25:
            b.place_kink(b.map(b.param(_shape(rng, True), _decade(rng, lo, hi)), str(rng.choice(KINKED))), 1)
        elif r < 0.4:
            n = int(rng.integers(2, 4))
            b.matmul(b.param((n, n), _decade(rng, lo, hi)), str(rng.choice(SMOOTH)), int(rng.integers(1, 4)))
        else:
            b.map(b.param(_shape(rng, True), _decade(rng, lo, hi)), str(rng.choice(pieces)))
    return b.case(_decade(rng, lo, hi))


def _large(b: Builder) -> Case:
    rng = b.rng
    size = int(rng.integers(20_000, 100_001))
    shape = (size,) if rng.random() < 0.5 else (size // 100, 100)
    b.map(b.param(shape, _decade(rng, -1, 1)), str(rng.choice(("tanh", "sp1", "sq", "sin"))))
    b.map(b.param((4,), _decade(rng, -1, 1)), "tanh")
    return b.case(_decade(rng, -1, 1))


_BUILD = {"steep": _steep, "kinks": _kinks, "scales": _scales, "shapes": _shapes,
          "float32": _low, "float32only": _low, "float16": _low, "large": _large, "inside16": _low,
          "float32back": _low}


def dtype_of(name: str) -> np.dtype:
    if name == "bfloat16":
        import ml_dtypes

        return np.dtype(ml_dtypes.bfloat16)
    return np.dtype(name)


def _dtype(category: str, rng) -> tuple[str, str]:
    if category in ("float32", "float16"):
        return category, "generic"
    if category == "float32only":
        return "float32", "cast"
    if category == "float32back":
        return "float32", "castback"
    if category == "inside16":
        return str(rng.choice(["bfloat16", "float16"])), str(rng.choice(["inside64", "inside32"]))
    if category in ("shapes", "large") and rng.random() < 0.25:
        return "float32", "generic"
    return "float64", "generic"


def correct_case(category: str, seed: int) -> Case:
    pick = np.random.default_rng([99, ALL_CATEGORIES.index(category), seed])
    dtype, flavor = _dtype(category, pick)
    return _BUILD[category](Builder(category, seed, dtype, flavor))
