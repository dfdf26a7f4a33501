"""Hints for failing blocks of a Hessian, each given only when the evidence fits every
compared element of the block (a hint that does not fit is never given).

- a missing block: every compared analytic element is exactly 0 where the numeric block is not;
- the upper triangle filled and the lower not (or the other way round): the zero block lies
  on one side of the diagonal and its mirror block agrees, or within a diagonal block every
  element on one side of the diagonal is 0 and the other side agrees;
- a transposed block: two tensors of the same size whose block holds the numeric block's
  transpose;
- a factor of 2 on the diagonal: off-diagonal elements agree, diagonal ones are twice (or
  half) the numeric ones.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .second_blocks import BlockTally
from .second_numeric import FAIL

FIT = 1e-3  # a pattern fits an element when it predicts it within this relative error


def _close(a: np.ndarray, b: np.ndarray, threshold: float) -> np.ndarray:
    scale = np.maximum(np.abs(a), np.abs(b))
    return np.abs(a - b) <= max(FIT, 10 * threshold) * scale + 1e-300


def block_hints(tallies: Mapping[tuple[str, str], BlockTally], order: Sequence[str],
                threshold: float) -> dict[tuple[str, str], str]:
    """One sentence per failing block whose evidence fits a known pattern."""
    out = {}
    for key, t in tallies.items():
        if t.failed == 0 or t.problem:
            continue
        hint = (_triangle(t, tallies, order) or _missing(t) or _transposed(t, threshold)
                or _diagonal(t, threshold))
        if hint:
            out[key] = hint
    return out


def _kept(t: BlockTally) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
    """Which elements were compared, their codes, analytic and numeric values (None when
    the block was too large to keep them)."""
    if t.code is None or t.analytic is None or t.numeric is None:
        return None
    return t.code >= 0, t.code, t.analytic, t.numeric


def _missing(t: BlockTally) -> str | None:
    if t.nonzero or not t.checked:
        return None
    if t.rows == t.cols:
        return (f"the block {t.rows} × {t.cols} is 0 where the numeric one is not: the second "
                f"derivative of {t.rows} with itself is missing")
    return (f"the block {t.rows} × {t.cols} is 0 where the numeric one is not: the cross term "
            f"between {t.rows} and {t.cols} is missing")


def _triangle(t: BlockTally, tallies: Mapping[tuple[str, str], BlockTally],
              order: Sequence[str]) -> str | None:
    if t.rows != t.cols:
        mirror = tallies.get((t.cols, t.rows))
        if t.nonzero or mirror is None or mirror.failed or not mirror.checked or not mirror.nonzero:
            return None
        filled, empty = ("upper", "lower") if order.index(t.rows) > order.index(t.cols) else ("lower", "upper")
        return (f"the {filled} triangle is filled and the {empty} is not: block {t.rows} × "
                f"{t.cols} is 0 while its mirror {t.cols} × {t.rows} agrees")
    kept = _kept(t)
    if kept is None:
        return None
    seen, code, analytic, _ = kept
    i, j = np.indices(code.shape)
    for empty, side in (("lower", i > j), ("upper", i < j)):
        other = ~side & seen
        here = side & seen
        if not here.any() or not other.any():
            continue
        zero = np.all(analytic[here] == 0)
        fails = np.any(code[here] == FAIL)
        rest_ok = np.all(code[other] != FAIL)
        if zero and fails and rest_ok:
            filled = "upper" if empty == "lower" else "lower"
            return (f"the {filled} triangle is filled and the {empty} is not: in block "
                    f"{t.rows} × {t.cols} every element {'below' if empty == 'lower' else 'above'} "
                    f"the diagonal is 0 while the rest agrees")
    return None


def _transposed(t: BlockTally, threshold: float) -> str | None:
    kept = _kept(t)
    if kept is None or t.rows == t.cols or t.n_rows != t.n_cols or t.n_rows < 2:
        return None
    seen, code, analytic, numeric = kept
    both = seen & seen.T
    off = both & ~np.eye(t.n_rows, dtype=bool)
    failing = seen & (code == FAIL)
    if not off.any() or np.any(failing & ~both):
        return None
    fits = _close(analytic[both], numeric.T[both], threshold)
    if np.all(fits) and np.any(failing[both]):
        return (f"the block {t.rows} × {t.cols} holds the transpose of the numeric one: "
                "a transpose is missing or one too many")
    return None


def _diagonal(t: BlockTally, threshold: float) -> str | None:
    kept = _kept(t)
    if kept is None or t.rows != t.cols:
        return None
    seen, code, analytic, numeric = kept
    diag = seen & np.eye(t.n_rows, dtype=bool)
    offd = seen & ~np.eye(t.n_rows, dtype=bool)
    if not diag.any() or np.any(code[offd] == FAIL):
        return None
    a, n = analytic[diag], numeric[diag]
    if not np.any(code[diag] == FAIL) or np.any(n == 0):
        return None
    for factor, word in ((2.0, "twice"), (0.5, "half")):
        if np.all(_close(a, factor * n, threshold)):
            return (f"the diagonal of block {t.rows} × {t.cols} is {word} the numeric one while "
                    "the off-diagonal elements agree: a factor of 2 on the diagonal")
    return None

