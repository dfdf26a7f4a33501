"""Whole-tensor models: a constant factor (sign, 2, 1/2, the batch size), a transpose, zeros,
and two tensors whose gradients were exchanged."""

from __future__ import annotations

import numpy as np

from .evidence import EXPLAINED, Context, Evidence, count, explains

FACTOR_MATCH = 0.01  # a fitted factor within 1% of 2, 1/2, B, 1/B is named as that


def steady_ratio(c: float, e: Evidence) -> bool:
    """analytic / numeric is ``c`` on every failing element, to EXPLAINED of ``c`` itself: a
    factor, not a least-squares ratio between unrelated values (which explains() alone can
    accept when the analytic values are small next to the numeric ones)."""
    model = c * e.numeric[e.failed]
    return bool(np.all(np.abs(e.analytic[e.failed] - model) <= EXPLAINED * np.abs(model)))


def factor_hint(e: Evidence, ctx: Context) -> str | None:
    top = float(np.max(np.abs(e.numeric))) if e.numeric.size else 0.0
    if top == 0 or not np.isfinite(top):
        return None
    unit = e.numeric / top  # the fitted factor is the same; squares of gradients ~1e154 overflow
    c = float((e.analytic / top) @ unit) / float(unit @ unit)
    if abs(c) < 1e-12 or not explains(c * e.numeric, e) or not steady_ratio(c, e):
        return None
    if abs(c + 1) <= FACTOR_MATCH:
        return "analytic is -1 x numeric: the sign is flipped"
    size = abs(c)
    sign = "-" if c < 0 else ""
    causes = [
        (2.0, "2 x numeric", ("a factor 2 too many, as when forward halves a square (0.5 * r**2) "
                              "and backward keeps the 2 of its derivative")),
        (0.5, "0.5 x numeric", "a factor 2 is missing, as when the derivative of r**2 is taken as r"),
    ]
    for b in sorted(set(ctx.batch_sizes)):
        if b > 2:
            causes.append((float(b), f"{b} x numeric, the batch size",
                           "forward averages over the batch but backward does not divide by it"))
            causes.append((1.0 / b, f"1/{b} x numeric, one over the batch size",
                           "backward divides by the batch size where forward sums, or divides twice"))
    named = [(label, cause) for value, label, cause in causes if abs(size / value - 1) <= FACTOR_MATCH]
    if len(named) == 1:
        label, cause = named[0]
        return f"analytic is {sign}{label}: {cause}"
    if np.count_nonzero(e.numeric) < 2:  # any error in one value is "a factor": that says nothing
        return None
    return f"analytic is {c:.4g} x numeric everywhere: a constant factor is wrong"


def transpose_hint(e: Evidence) -> str | None:
    if len(e.shape) != 2 or e.shape[0] != e.shape[1] or e.shape[0] < 2 or not e.complete:
        return None
    numeric_transposed = e.full(e.numeric).T.reshape(-1)[e.flat]
    if explains(numeric_transposed, e):
        return ("analytic is the numeric gradient transposed: a transpose is missing or extra "
                "(x.T @ d versus d.T @ x)")
    return None


def zero_hint(e: Evidence) -> str | None:
    failing_a = e.analytic[e.failed]
    failing_n = e.numeric[e.failed]
    if not failing_a.size or np.any(failing_a) or not np.all(failing_n != 0):
        return None
    if e.failed.all() and not np.any(e.analytic):
        return ("analytic is zero everywhere while the numeric gradient is not: backward never "
                "fills this gradient in, or cuts every path to it")
    return (f"analytic is zero at {count(failing_a.size, 'coordinate')} where the numeric gradient "
            "is not: a term is missing from backward there, or a mask zeroes it")


def swapped_pairs(evidence: list[Evidence]) -> dict[str, str]:
    """Hints for failing same-shaped tensors whose analytic gradients are each other's."""
    hints: dict[str, str] = {}
    failing = [e for e in evidence if e.fails and e.complete]
    for i, x in enumerate(failing):
        for y in failing[i + 1:]:
            if x.shape != y.shape or x.name in hints or y.name in hints:
                continue
            if explains(y.numeric, x) and explains(x.numeric, y):
                text = f"the gradients of {x.name} and {y.name} look swapped"
                hints[x.name] = hints[y.name] = text
    return hints
