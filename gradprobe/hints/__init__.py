"""Hints: one sentence on the likely cause of a failing tensor, only when the evidence fits.

Each rule proposes a model of a bug (the analytic gradient is c times the numeric one, its
transpose, another tensor's gradient, one term of a sum, ...) or a pattern of where the
errors are (repeated indices, overlapping windows, the layers before one layer), and fires only
when the evidence fits it and no other listed cause fits as well; where two causes fit, the
hint names both. A random error fits no model, so it gets no hint.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

from .evidence import EXPLAINED, Context, Evidence
from .reuse import repeat_hint, slice_hint
from .scale import factor_hint, swapped_pairs, transpose_hint, zero_hint
from .stack import boundary, stack_hint
from .terms import term_hints
from .windows import window_hint

__all__ = ["EXPLAINED", "Context", "Evidence", "diagnose", "hint_for", "swapped_pairs"]


def _rules(e: Evidence, ctx: Context) -> Iterator[tuple[str, Callable[[], str | None]]]:
    """(kind, rule) pairs, most specific first; ``own`` kinds are causes inside the tensor's
    own backward that an error passed down from a later layer cannot produce."""
    yield "scale", lambda: zero_hint(e) if not np.any(e.analytic) else None
    yield "own", lambda: transpose_hint(e)
    yield "scale", lambda: factor_hint(e, ctx)
    yield "scale", lambda: slice_hint(e)
    yield "own", lambda: repeat_hint(e, ctx)
    yield "own", lambda: window_hint(e)
    yield "scale", lambda: zero_hint(e)


def _first(e: Evidence, ctx: Context) -> tuple[str, str] | None:
    if not e.fails:
        return None
    for kind, rule in _rules(e, ctx):
        found = rule()
        if found:
            return kind, found
    return None


def hint_for(e: Evidence, ctx: Context) -> str | None:
    """The most specific hint whose model explains the failure of ``e`` alone, or None."""
    found = _first(e, ctx)
    return found[1] if found else None


def diagnose(evidence: list[Evidence], ctx: Context) -> dict[str, str]:
    """A hint per failing tensor name where the evidence supports one (a value out of float64's
    range makes a model not fit; it never prints a warning)."""
    with np.errstate(all="ignore"):
        return _diagnosed(evidence, ctx)


def _diagnosed(evidence: list[Evidence], ctx: Context) -> dict[str, str]:
    hints = swapped_pairs(evidence)
    own = bool(hints)  # an exchange of two gradients is no error passed down
    for name, text in term_hints(evidence, ctx).items():
        hints.setdefault(name, text)
        own = True
    for e in evidence:
        found = None if e.name in hints else _first(e, ctx)
        if found:
            hints[e.name] = found[1]
            own = own or found[0] == "own"
    found_boundary = boundary(evidence, ctx)
    if found_boundary and not own:
        text = stack_hint(*found_boundary)
        hints.update({e.name: text for e in evidence if e.fails})
    return hints
