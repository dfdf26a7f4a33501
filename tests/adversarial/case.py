"""An adversarial target as data, and its numpy source text (forward, backward, setup).

A case is a sum of terms ``T`` over params, times a loss scale ``S`` (``S*T`` or ``S*T*T/2``):

- ``map``: ``sum(w * g(f(a * (p - k))))`` (``g`` optional), ``a``, ``k``, ``w`` inputs shaped like p;
- ``pair``: ``sum(w * f(a * (p - k)) * g(b * (q - m)))``, ``q`` shaped like ``p`` or 0-d (broadcast);
- ``max``: ``sum(w * maximum(p, q))`` (ties placed on purpose);
- ``matmul``: ``sum(w * f(X @ p))``; ``resid``: ``sum(w * f(X @ p - k))`` (residuals placed
  near a kink).

The backward is the hand-written reverse pass of exactly that, optionally with one planted bug.
Targets are ``generic`` (they compute in whatever dtype the arrays have, so a wider run is
possible), ``cast`` (they cast every array to float32 and the loss with ``np.float32(...)``) or
``castback`` (generic, but backward casts every gradient to float32 whatever it is given).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from .ops import PIECES

LAYOUTS = ("c", "fortran", "strided", "broadcast", "reversed")


@dataclass(frozen=True)
class Term:
    kind: str  # map | pair | max | matmul | resid
    j: int  # its inputs are w{j}, a{j}, k{j}, b{j}, m{j}, X{j}
    p: str
    op: str | None = None
    op2: str | None = None  # map: an outer piece applied to the first one's value
    q: str | None = None
    qop: str | None = None


@dataclass(frozen=True)
class Bug:
    kind: str  # sign | factor | transpose | dropped | element | piece | chain
    tensor: str
    term: int | None = None  # dropped / piece / chain
    index: tuple[int, ...] | None = None  # element
    factor: float = 1.0  # factor, element (the element is multiplied by it)


@dataclass
class Case:
    category: str
    seed: int
    dtype: str
    flavor: str  # generic | cast | castback | inside64 | inside32
    params: dict[str, np.ndarray]  # values, C-ordered; the layout is applied by setup()
    layouts: dict[str, str]
    inputs: dict[str, np.ndarray]
    terms: list[Term]
    scale: float  # S, exactly representable in dtype
    outer: str = "id"  # id | sq
    bug: Bug | None = None
    kinks: list[tuple[str, tuple[int, ...], float]] = field(default_factory=list)  # placed: tensor, index, distance/scale
    notes: list[str] = field(default_factory=list)

    @property
    def name(self) -> str:
        return f"{self.category}-{self.seed}"

    @property
    def correct(self) -> bool:
        return self.bug is None

    @property
    def array_type(self) -> str | None:
        """The arrays' own type where the code casts them to ``dtype`` inside, else None."""
        return {"inside64": "float64", "inside32": "float32"}.get(self.flavor)

    def arrays(self) -> dict[str, np.ndarray]:
        out = {**{f"param_{k}": v for k, v in self.params.items()}, **{f"input_{k}": v for k, v in self.inputs.items()}}
        if self.array_type is not None:  # the same values, held in the wider type
            out = {k: np.asarray(v).astype(self.array_type) for k, v in out.items()}
        return out

    def with_bug(self, bug: Bug | None) -> Case:
        return Case(self.category, self.seed, self.dtype, self.flavor, self.params, self.layouts, self.inputs,
                    self.terms, self.scale, self.outer, bug, self.kinks, self.notes)


def _sub(src: str, var: str) -> str:
    return re.sub(r"\bx\b", var, src)


def _value(op: str, var: str) -> str:
    return _sub(PIECES[op].value, var)


def _deriv(op: str, var: str, wrong: bool = False) -> str:
    piece = PIECES[op]
    return _sub(piece.wrong if wrong else piece.deriv, var)


def _forward_term(t: Term) -> list[str]:
    j = t.j
    if t.kind == "map":
        lines = [f"u = I['a{j}'] * (P['{t.p}'] - I['k{j}'])", f"v = {_value(t.op, 'u')}"]
        if t.op2:
            lines.append(f"v = {_value(t.op2, 'v')}")
        return lines + [f"t = np.sum(I['w{j}'] * v)"]
    if t.kind == "pair":
        return [f"u = I['a{j}'] * (P['{t.p}'] - I['k{j}'])", f"v = I['b{j}'] * (P['{t.q}'] - I['m{j}'])",
                f"t = np.sum(I['w{j}'] * ({_value(t.op, 'u')}) * ({_value(t.qop, 'v')}))"]
    if t.kind == "max":
        return [f"t = np.sum(I['w{j}'] * np.maximum(P['{t.p}'], P['{t.q}']))"]
    if t.kind in ("matmul", "resid"):
        shift = f" - I['k{j}']" if t.kind == "resid" else ""
        return [f"z = I['X{j}'] @ P['{t.p}']{shift}", f"t = np.sum(I['w{j}'] * ({_value(t.op, 'z')}))"]
    raise ValueError(t.kind)


def _backward_term(t: Term, bug: Bug | None) -> list[str]:
    j = t.j
    wrong = bug is not None and bug.kind == "piece" and bug.term == j
    chain = "" if (bug is not None and bug.kind == "chain" and bug.term == j) else f" * I['a{j}']"
    drop = bug.tensor if (bug is not None and bug.kind == "dropped" and bug.term == j) else None

    def add(name: str, expr: str) -> str:
        return f"pass  # the {name} part of this term is left out" if name == drop else f"G['{name}'] = G['{name}'] + {expr}"

    if t.kind == "map":
        lines = [f"u = I['a{j}'] * (P['{t.p}'] - I['k{j}'])"]
        if t.op2:
            lines += [f"v = {_value(t.op, 'u')}",
                      f"d = I['w{j}'] * ({_deriv(t.op2, 'v')}) * ({_deriv(t.op, 'u', wrong)})"]
        else:
            lines.append(f"d = I['w{j}'] * ({_deriv(t.op, 'u', wrong)})")
        return lines + [add(t.p, f"o * (d{chain})")]
    if t.kind == "pair":
        lines = [f"u = I['a{j}'] * (P['{t.p}'] - I['k{j}'])", f"v = I['b{j}'] * (P['{t.q}'] - I['m{j}'])",
                 f"dp = I['w{j}'] * ({_deriv(t.op, 'u', wrong)}) * ({_value(t.qop, 'v')}){chain}",
                 f"dq = I['w{j}'] * ({_value(t.op, 'u')}) * ({_deriv(t.qop, 'v')}) * I['b{j}']",
                 add(t.p, "o * dp"),
                 f"if np.ndim(P['{t.q}']) == 0:", "    dq = np.sum(dq)",
                 add(t.q, "o * dq")]
        return lines
    if t.kind == "max":
        return [f"first = P['{t.p}'] >= P['{t.q}']",
                add(t.p, f"o * I['w{j}'] * first"), add(t.q, f"o * I['w{j}'] * ~first")]
    if t.kind in ("matmul", "resid"):
        shift = f" - I['k{j}']" if t.kind == "resid" else ""
        return [f"z = I['X{j}'] @ P['{t.p}']{shift}",
                add(t.p, f"o * (I['X{j}'].T @ (I['w{j}'] * ({_deriv(t.op, 'z', wrong)})))")]
    raise ValueError(t.kind)


_HEAD = '''"""Adversarial target {name} ({what}). Generated by tests/adversarial; replay with
``gradprobe check {file}``. {expect}"""

import numpy as np

{arrays}


def _strided(a):
    base = np.zeros(a.shape[:-1] + (2 * a.shape[-1],), a.dtype)
    base[..., ::2] = a
    return base[..., ::2]


LAYOUT = {{
    "c": lambda a: a,
    "fortran": np.asfortranarray,
    "strided": _strided,
    "broadcast": lambda a: np.broadcast_to(a[:1], a.shape),
    "reversed": lambda a: np.ascontiguousarray(a[::-1])[::-1],
}}
LAYOUTS = {layouts!r}


def setup():
    params = {{n: LAYOUT[LAYOUTS[n]](ARRAYS["param_" + n]) for n in LAYOUTS}}
    inputs = {{n[6:]: a for n, a in ARRAYS.items() if n.startswith("input_")}}
    return params, inputs

'''


def _prologue(case: Case) -> list[str]:
    if case.flavor == "cast":
        return ["P = {n: np.asarray(a, dtype=np.float32) for n, a in params.items()}",
                "I = {n: np.asarray(a, dtype=np.float32) for n, a in inputs.items()}"]
    if case.array_type is not None:
        inner = "ml_dtypes.bfloat16" if case.dtype == "bfloat16" else f"np.{case.dtype}"
        return ["import ml_dtypes  # noqa: F401", f"INNER = np.dtype({inner})",
                "P = {n: np.asarray(a).astype(INNER) for n, a in params.items()}",
                "I = {n: np.asarray(a).astype(INNER) for n, a in inputs.items()}"]
    return ["P, I = params, inputs"]


def _total(case: Case) -> list[str]:
    lines: list[str] = []
    for t in case.terms:
        lines += _forward_term(t)
        lines.append("T = t" if t is case.terms[0] else "T = T + t")
    return lines


def source(case: Case, arrays_line: str = "ARRAYS = globals().get('ARRAYS', {})", expect: str = "") -> str:
    """The target's module source. ``arrays_line`` defines ``ARRAYS`` (name -> array)."""
    s = repr(case.scale)
    loss = f"{s} * T" if case.outer == "id" else f"{s} * T * T / 2"
    if case.flavor == "cast":
        loss = f"np.float32({loss})"
    if case.array_type is not None:
        loss = f"np.{case.array_type}(float({loss}))"
    fwd = ["def forward(params, inputs):"] + ["    " + x for x in _prologue(case) + _total(case) + [f"return {loss}"]]
    body = _prologue(case)
    if case.outer == "sq":
        body += _total(case) + [f"o = {s} * T"]
    else:
        body.append(f"o = {s}")
    body.append("G = {n: np.zeros(np.shape(a), a.dtype) for n, a in P.items()}")
    for t in case.terms:
        body += _backward_term(t, case.bug)
    bug = case.bug
    if bug is not None:
        n = bug.tensor
        if bug.kind == "sign":
            body.append(f"G['{n}'] = -G['{n}']")
        elif bug.kind == "factor":
            body.append(f"G['{n}'] = G['{n}'] * {bug.factor!r}")
        elif bug.kind == "transpose":
            body.append(f"G['{n}'] = G['{n}'].T")
        elif bug.kind == "element":
            body += [f"G['{n}'] = np.array(G['{n}'])", f"G['{n}'][{bug.index!r}] *= {bug.factor!r}"]
    if case.array_type is not None:
        body.append(f"return {{n: np.asarray(g).astype(np.{case.array_type}) for n, g in G.items()}}")
    elif case.flavor == "castback":
        body.append("return {n: np.asarray(g).astype(np.float32) for n, g in G.items()}")
    else:
        body.append("return G")
    bwd = ["def backward(params, inputs):"] + ["    " + x for x in body]
    what = "correct" if bug is None else f"bug: {bug.kind} in {bug.tensor}"
    head = _HEAD.format(name=case.name, what=what, file=f"{case.name}.py", expect=expect,
                        arrays=arrays_line, layouts=case.layouts)
    return head + "\n".join(fwd) + "\n\n\n" + "\n".join(bwd) + "\n"


def load(case: Case) -> dict:
    """Execute the case's source in a fresh namespace; returns it (setup, forward, backward)."""
    ns: dict = {"ARRAYS": case.arrays(), "__name__": f"adversarial_{case.category}_{case.seed}"}
    exec(compile(source(case), f"<adversarial {case.name}>", "exec"), ns)
    return ns


def write(case: Case, folder, note: str = "") -> str:
    """Write the case as a standalone target: ``NAME.py`` beside ``NAME.npz`` (its arrays)."""
    from pathlib import Path

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    np.savez(folder / f"{case.name}.npz", **case.arrays())
    line = "ARRAYS = dict(np.load(__file__[:-3] + '.npz'))"
    path = folder / f"{case.name}.py"
    path.write_text(source(case, line, note))
    return str(path)
