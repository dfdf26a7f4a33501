"""Planting one bug in a correct case: sign, factor, transpose, dropped term, one wrong
element, the wrong derivative of one piece, or a piece's inner factor left out (chain rule)."""

from __future__ import annotations

import numpy as np

from .case import Bug, Case, load
from .generate import ALL_CATEGORIES, correct_case

# Sizes from the goals too: 0.5% in float32 and 5% in float16 are caught where the
# dtype resolves them (expected to fail only once the threshold the report states is below them).
FACTORS = {"float64": (2.0, 0.5, 1.1, 1.01, 1.001), "float32": (2.0, 0.5, 1.1, 1.05, 1.005),
           "float16": (2.0, 0.5, 1.3, 1.1, 1.05), "bfloat16": (2.0, 0.5, -1.0, 1.3, 1.2)}
ELEMENT = {"float64": (1.01, 1.001, 1.2), "float32": (1.01, 1.2, 0.8, 1.005), "float16": (1.2, 0.7, 1.1), "bfloat16": (1.5, 0.7, 1.3)}
BUGGY_SHARE = {"large": 0.5}


def _choices(case: Case) -> list[tuple[str, str, int | None]]:
    out: list[tuple[str, str, int | None]] = []
    sized = [n for n, p in case.params.items() if p.size]
    for n in sized:
        out += [("sign", n, None), ("factor", n, None)]
        if case.params[n].size >= 2:
            out.append(("element", n, None))
        shape = case.params[n].shape
        if len(shape) == 2 and shape[0] == shape[1] >= 2:
            out.append(("transpose", n, None))
    for t in case.terms:
        if not case.params[t.p].size:
            continue
        out.append(("dropped", t.p, t.j))
        if t.kind in ("map", "pair", "matmul", "resid"):
            out.append(("piece", t.p, t.j))
        if t.kind in ("map", "pair"):
            out.append(("chain", t.p, t.j))
        if t.q and case.params[t.q].size:
            out.append(("dropped", t.q, t.j))
    return out


def plant(case: Case, rng: np.random.Generator) -> Bug | None:
    if case.category == "large":
        choices = [("element", max(case.params, key=lambda n: case.params[n].size), None)]
    else:
        choices = _choices(case)
    if not choices:
        return None
    kind, tensor, term = choices[rng.integers(len(choices))]
    if kind == "factor":
        return Bug(kind, tensor, factor=float(rng.choice(FACTORS[case.dtype])))
    if kind == "element":
        ns = load(case)
        g = np.asarray(ns["backward"](*ns["setup"]())[tensor], dtype=np.float64)
        big = np.flatnonzero(np.abs(g) >= 0.5 * np.sqrt(np.mean(g * g)))
        flat = int(rng.choice(big)) if big.size else int(rng.integers(g.size))
        index = tuple(int(i) for i in np.unravel_index(flat, g.shape))
        return Bug(kind, tensor, index=index, factor=float(rng.choice(ELEMENT[case.dtype])))
    return Bug(kind, tensor, term=term)


def make_case(category: str, seed: int) -> Case:
    """The case ``(category, seed)``: correct, or (about 30%, half of ``large``) with one bug."""
    case = correct_case(category, seed)
    rng = np.random.default_rng([7, ALL_CATEGORIES.index(category), seed])
    if rng.random() < BUGGY_SHARE.get(category, 0.3):
        return case.with_bug(plant(case, rng))
    return case
