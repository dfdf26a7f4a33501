"""Hints: one sentence on the likely cause of a failing tensor, only when the evidence fits.

Each rule proposes a model of the bug (the analytic gradient is c times the numeric one, its
transpose, another tensor's gradient, ...) and fires only when that model explains nearly
all of the discrepancy: the residual left by the model must be at most ``EXPLAINED`` of the
distance between analytic and numeric. A random error fits no model, so it gets no hint.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

EXPLAINED = 0.05  # a model must leave at most 5% of the discrepancy unexplained
FACTOR_MATCH = 0.01  # a fitted factor within 1% of 2, 1/2, B, 1/B is named as that


@dataclass(frozen=True)
class Evidence:
    """What a tensor's check measured: checked flat indices, analytic and numeric values."""

    name: str
    shape: tuple[int, ...]
    flat: np.ndarray
    analytic: np.ndarray
    numeric: np.ndarray
    failed: np.ndarray  # bool per checked coordinate

    @property
    def complete(self) -> bool:
        return self.flat.size == int(np.prod(self.shape, dtype=np.int64))

    def failed_mask(self) -> np.ndarray:
        """Failing coordinates in the tensor's shape (unchecked ones count as not failing)."""
        mask = np.zeros(self.shape, dtype=bool)
        mask.reshape(-1)[self.flat] = self.failed
        return mask

    def full(self, values: np.ndarray) -> np.ndarray:
        out = np.full(self.shape, np.nan)
        out.reshape(-1)[self.flat] = values
        return out


@dataclass(frozen=True)
class HintContext:
    """Facts about the target that name causes: batch sizes, integer index inputs."""

    batch_sizes: tuple[int, ...] = ()
    index_inputs: dict[str, np.ndarray] = field(default_factory=dict)


def _norm(v: np.ndarray) -> float:
    return float(np.linalg.norm(v))


def _explains(model: np.ndarray, e: Evidence) -> bool:
    """``model`` (a prediction of the analytic values) leaves <= 5% of the discrepancy."""
    gap = _norm(e.analytic - e.numeric)
    return gap > 0 and _norm(e.analytic - model) <= EXPLAINED * gap


def _fmt_factor(c: float) -> str:
    return f"{c:.4g}"


def _factor_hint(e: Evidence, ctx: HintContext) -> str | None:
    n2 = float(e.numeric @ e.numeric)
    if n2 == 0:
        return None
    c = float(e.analytic @ e.numeric) / n2
    if not _explains(c * e.numeric, e) or abs(c) < 1e-12:
        return None
    if abs(c + 1) <= FACTOR_MATCH:
        return "analytic is -1 x numeric: the sign is flipped"
    size = abs(c)
    sign = "-" if c < 0 else ""
    causes = [
        (2.0, "2 x numeric", "a factor 2 too many (a 1/2 in forward, such as 0.5 * r**2, not carried into backward?)"),
        (0.5, "0.5 x numeric", "a factor 2 missing (the derivative of x**2 is 2x)"),
    ]
    for b in sorted(set(ctx.batch_sizes)):
        if b > 2:
            causes.append((float(b), f"{b} x numeric, the batch size",
                           "forward averages over the batch but backward does not divide by it"))
            causes.append((1.0 / b, f"1/{b} x numeric, one over the batch size",
                           "backward divides by the batch size but forward sums (or it divides twice)"))
    for value, label, cause in causes:
        if abs(size / value - 1) <= FACTOR_MATCH:
            return f"analytic is {sign}{label}: {cause}"
    return f"analytic is {_fmt_factor(c)} x numeric everywhere: a constant factor is wrong"


def _transpose_hint(e: Evidence) -> str | None:
    if len(e.shape) != 2 or e.shape[0] != e.shape[1] or e.shape[0] < 2 or not e.complete:
        return None
    numeric_transposed = e.full(e.numeric).T.reshape(-1)[e.flat]
    if _explains(numeric_transposed, e):
        return (
            "analytic is the numeric gradient transposed: a transpose is missing or extra "
            "(x.T @ d versus d.T @ x)"
        )
    return None


def _slice_hint(e: Evidence) -> str | None:
    if not e.complete or len(e.shape) < 1:
        return None
    failed = e.failed_mask()
    size = failed.size
    for axis, length in enumerate(e.shape):
        if length < 3 or size // length < 2:  # a slice of one element says nothing
            continue
        slices = np.moveaxis(failed, axis, 0).reshape(length, -1)
        right = np.flatnonzero(~slices.any(axis=1))
        # exactly one slice is right and every coordinate outside it is wrong
        if right.size == 1 and np.delete(slices, right[0], axis=0).all():
            i = int(right[0])
            zero = ""
            rest = np.delete(np.moveaxis(e.full(e.analytic), axis, 0), i, axis=0)
            if not np.any(rest):
                zero = " and zero elsewhere"
            what = "row" if axis == 0 else f"slice along axis {axis}"
            return (
                f"right only in {what} {i}{zero}: backward seems to handle one item of axis "
                f"{axis} only (a sum or loop over that axis is missing)"
            )
    return None


def _repeat_hint(e: Evidence, ctx: HintContext) -> str | None:
    if not e.shape or not e.complete:
        return None
    rows = e.shape[0]
    failed_rows = np.asarray(e.failed_mask().reshape(rows, -1).any(axis=1))
    if not failed_rows.any():
        return None
    a = np.abs(e.analytic[e.failed])
    n = np.abs(e.numeric[e.failed])
    if not np.all(a < n):
        return None
    for name, idx in ctx.index_inputs.items():
        if idx.size == 0 or idx.min() < 0 or idx.max() >= rows:
            continue
        counts = np.bincount(idx.reshape(-1), minlength=rows)
        repeated = counts >= 2
        if repeated.any() and np.array_equal(failed_rows, repeated & failed_rows) and failed_rows[repeated].mean() >= 0.5:
            return (
                f"too small exactly at rows that {name} uses more than once: gradients are "
                "assigned instead of accumulated (np.add.at, or +=, for repeated indices)"
            )
    return None


def _zero_hint(e: Evidence) -> str | None:
    failing_a = e.analytic[e.failed]
    failing_n = e.numeric[e.failed]
    if failing_a.size and not np.any(failing_a) and np.all(failing_n != 0):
        where = "everywhere" if e.failed.all() else f"at {failing_a.size} coordinates"
        return f"analytic is zero {where} where the numeric gradient is not: a term is missing from backward"
    return None


def hint_for(e: Evidence, ctx: HintContext) -> str | None:
    """The most specific hint whose model explains the failure of ``e``, or None."""
    if not e.failed.any():
        return None
    for rule in (
        lambda: _zero_hint(e) if not np.any(e.analytic) else None,
        lambda: _transpose_hint(e),
        lambda: _factor_hint(e, ctx),
        lambda: _slice_hint(e),
        lambda: _repeat_hint(e, ctx),
        lambda: _zero_hint(e),
    ):
        found = rule()
        if found:
            return found
    return None


def swapped_pairs(evidence: list[Evidence]) -> dict[str, str]:
    """Hints for failing same-shaped tensors whose analytic gradients are each other's."""
    hints: dict[str, str] = {}
    failing = [e for e in evidence if e.failed.any() and e.complete]
    for i, x in enumerate(failing):
        for y in failing[i + 1 :]:
            if x.shape != y.shape or x.name in hints or y.name in hints:
                continue
            if _explains(y.numeric, x) and _explains(x.numeric, y):
                text = f"the gradients of {x.name} and {y.name} look swapped"
                hints[x.name] = hints[y.name] = text
    return hints


def diagnose(evidence: list[Evidence], ctx: HintContext) -> dict[str, str]:
    """A hint per failing tensor name where the evidence supports one."""
    hints = swapped_pairs(evidence)
    for e in evidence:
        if e.name not in hints:
            found = hint_for(e, ctx)
            if found:
                hints[e.name] = found
    return hints
