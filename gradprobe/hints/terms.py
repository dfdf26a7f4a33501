"""One term instead of the sum: a weight gradient that holds the contribution of one item of
an input (one time step, one sample) alone, as when a loop assigns where it should add.

A dense map's weight gradient is a sum over items of (item's input rows)ᵀ · (item's upstream
rows). The contribution of item t lies in the span of that item's input rows; the whole sum
does not. So the rule fires when the analytic gradient lies in the span of exactly one item's
rows, at an end of the loop, and the numeric gradient clearly does not. Other failing tensors
whose analytic values lie in the same upstream span (a recurrent weight, a bias) are the same
term of the same loop.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from ..common.classes import dataclass
from .evidence import Context, Evidence, as_float64, norm

RANK_TOL = 1e-8  # singular values below this share of the largest do not count
INSIDE = 1e-6  # the analytic gradient leaves at most this share outside the item's span
OUTSIDE = 0.05  # the numeric gradient leaves at least this share outside it
MAX_RANK = 64  # items of more rows than this (large batches per step) are not tried


def _basis(rows: np.ndarray) -> np.ndarray:
    """An orthonormal basis (columns) of the span of ``rows`` (in float64: linalg takes no
    float16 inputs)."""
    _, s, vt = np.linalg.svd(np.asarray(rows, dtype=np.float64), full_matrices=False)
    if not s.size or s[0] == 0:
        return vt[:0].T
    return vt[: int((s > RANK_TOL * s[0]).sum())].T


def _outside(m: np.ndarray, q: np.ndarray) -> float:
    """The share of ``m``'s columns outside the span of ``q``'s columns."""
    size = norm(m)
    return norm(m - q @ (q.T @ m)) / size if size > 0 else 0.0


def _inside_only(analytic: np.ndarray, numeric: np.ndarray, q: np.ndarray) -> bool:
    """The analytic columns lie in the span, the numeric ones clearly do not."""
    return 0 < q.shape[1] < q.shape[0] and _outside(analytic, q) <= INSIDE and _outside(numeric, q) >= OUTSIDE


def _items(x: np.ndarray, width: int) -> Iterator[tuple[int, list[np.ndarray]]]:
    """(axis, the rows of each item along it) for an input whose last axis is ``width``."""
    if x.ndim < 2 or x.shape[-1] != width:
        return
    x = as_float64(x)
    if not np.all(np.isfinite(x)):
        return
    for axis in range(x.ndim - 1):
        moved = np.moveaxis(x, axis, 0)
        yield axis, [item.reshape(-1, width) for item in moved]


@dataclass(frozen=True)
class Term:
    """Item ``index`` of ``count`` along ``axis`` of input ``source``; ``upstream``: a basis
    of the space the other factor of that item's contribution lies in."""

    source: str
    axis: int
    index: int
    count: int
    upstream: np.ndarray


def _column_space(m: np.ndarray, limit: int) -> np.ndarray | None:
    """A basis of ``m``'s column space when its rank is at most ``limit``, else None; from a
    random sketch ``m @ g``, so a large full-rank gradient costs no decomposition of its own."""
    g = np.random.default_rng(0).normal(size=(m.shape[1], limit + 2))
    basis = _basis((m @ g).T)
    if basis.shape[1] > limit or _outside(m, basis) > INSIDE:
        return None
    return basis


def _term(e: Evidence, ctx: Context) -> Term | None:
    if len(e.shape) != 2 or not e.complete or not e.fails:
        return None
    a, n = e.full(e.analytic), e.full(e.numeric)
    for m_a, m_n in ((a, n), (a.T, n.T)):
        found = [(name, axis, items) for name, x in ctx.inputs.items()
                 for axis, items in _items(x, m_a.shape[0]) if len(items) >= 2]
        if not found:
            continue
        limit = min(max(items[0].shape[0] for _, _, items in found), MAX_RANK, min(m_a.shape) - 1)
        span = _column_space(m_a, limit) if limit > 0 else None
        if span is None or span.shape[1] == 0:
            continue  # a full sum of items, or zero: no single item's term
        for name, axis, items in found:
            if items[0].shape[0] < span.shape[1]:
                continue  # one item's rows cannot hold the analytic gradient
            hits = [t for t, rows in enumerate(items) if _inside_only(m_a, m_n, _basis(rows))]
            if len(hits) == 1 and hits[0] in (0, len(items) - 1):
                return Term(name, axis, hits[0], len(items), _basis(span.T @ m_a))
    return None


def _same_term(e: Evidence, term: Term) -> bool:
    """Do ``e``'s analytic values lie in the term's upstream span, its numeric ones not?"""
    q = term.upstream
    width = q.shape[0]
    if not e.complete or not e.fails or q.shape[1] >= width:
        return False
    a, n = e.full(e.analytic), e.full(e.numeric)
    if not np.any(a):  # zero lies in every span: that is the zero rule's case
        return False
    if a.ndim == 1 and a.size == width:
        return _inside_only(a[:, None], n[:, None], q)
    if a.ndim == 2:
        return any(_inside_only(ma, mn, q) for ma, mn in ((a.T, n.T), (a, n)) if ma.shape[0] == width)
    return False


def _sentence(term: Term, path_intact: bool) -> str:
    axis = f" along axis {term.axis}" if term.axis else ""
    head = (f"analytic holds only the term of item {term.index} (of {term.count}){axis} of "
            f"{term.source}, not the sum over all items: ")
    if path_intact:
        return head + "it is assigned instead of accumulated (+=) in a loop over those items"
    return head + (f"either it is assigned instead of accumulated (+=) in a loop over those items, "
                   f"or the gradient is not carried back from item {term.index} to the others "
                   "(a missing path back through time)")


def term_hints(evidence: list[Evidence], ctx: Context) -> dict[str, str]:
    """Hints for tensors whose analytic gradient is one item's contribution alone."""
    hints: dict[str, str] = {}
    by_name = {e.name: e for e in evidence}
    for e in evidence:
        if e.name in hints:
            continue
        term = _term(e, ctx)
        if term is None:
            continue
        own = by_name.get(term.source)  # the input's own gradient needs the path back
        text = _sentence(term, own is not None and own.complete and not own.fails)
        hints[e.name] = text
        for other in evidence:
            if other.name not in hints and _same_term(other, term):
                hints[other.name] = text
    return hints
