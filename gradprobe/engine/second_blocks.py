"""What check 1 found, gathered per block of the Hessian (row tensor x column tensor).

A coordinate direction ``e_j`` along column tensor C gives column ``j`` of every block
``R x C`` at once; a random direction along C gives ``(H v)_i`` for every row. A
:class:`BlockTally` keeps the counts, the worst element, the failing ones and, for blocks
small enough, every compared element (the error map and the evidence hints need them).
"""

from __future__ import annotations

import numpy as np

from ..report.second import BlockResult
from ..common.status import Status, worst
from .second_numeric import FAIL, KINK, UNSURE, Along

# Every compared value is kept (for error maps and hints) when the whole Hessian has at most
# KEEP_ELEMENTS elements: about 20 bytes each, so 20 MB at most.
KEEP_ELEMENTS = 1 << 20
LISTED = 100  # failing elements listed per block


class BlockTally:
    """Check 1's findings in the block ``rows`` x ``cols``."""

    def __init__(self, rows: str, cols: str, row_shape: tuple[int, ...],
                 col_shape: tuple[int, ...], keep: bool = True) -> None:
        self.rows, self.cols = rows, cols
        self.row_shape, self.col_shape = row_shape, col_shape
        self.n_rows = int(np.prod(row_shape, dtype=np.int64))
        self.n_cols = int(np.prod(col_shape, dtype=np.int64))
        keep = keep and self.n_rows * self.n_cols <= KEEP_ELEMENTS
        self.analytic = np.full((self.n_rows, self.n_cols), np.nan) if keep else None
        self.numeric = np.full((self.n_rows, self.n_cols), np.nan) if keep else None
        self.code = np.full((self.n_rows, self.n_cols), -1, dtype=np.int8) if keep else None
        self.rel = np.full((self.n_rows, self.n_cols), np.nan, dtype=np.float32) if keep else None
        self.checked = self.failed = self.kinks = self.unsure = 0
        self.nonzero = 0  # compared elements whose analytic value is not exactly 0
        self.worst: tuple[float, float, float, int, int] | None = None  # rel, abs, noise, i, j
        self.bad: list[tuple[int, int]] = []
        self.directions = self.directions_off = 0
        self.direction_worst = 0.0
        self.direction_status = Status.PASS
        self.problem: str | None = None
        self.located = 0  # bisections spent finding the column behind a failing direction

    def column(self, j: int, along: Along, part: slice) -> None:
        """Column ``j`` of the block, from a coordinate direction (rows ``part`` of it)."""
        a, n = along.analytic[part], along.numeric[part]
        code, rel = along.code[part], along.rel[part]
        noise = along.error[part] / along.denominator[part]
        self.checked += a.size
        self.failed += int(np.sum(code == FAIL))
        self.kinks += int(np.sum(code == KINK))
        self.unsure += int(np.sum(code == UNSURE))
        self.nonzero += int(np.count_nonzero(a))
        judged = np.where(code == KINK, 0.0, rel)
        if judged.size:
            i = int(np.argmax(judged))
            if self.worst is None or judged[i] > self.worst[0]:
                self.worst = (float(judged[i]), float(abs(a[i] - n[i])), float(noise[i]), i, j)
        for i in np.flatnonzero(code == FAIL)[: max(0, LISTED - len(self.bad))]:
            self.bad.append((int(i), j))
        if self.analytic is not None and self.numeric is not None:
            self.analytic[:, j], self.numeric[:, j] = a, n
        if self.code is not None and self.rel is not None:
            self.code[:, j], self.rel[:, j] = code, judged

    def direction(self, along: Along, part: slice) -> bool:
        """A random direction along the column tensor, seen in these rows; True when some
        row fails (the element behind it is then looked for)."""
        code = along.code[part]
        self.directions += 1
        off = bool(np.any(code == FAIL))
        self.directions_off += off
        judged = np.where(code == KINK, 0.0, along.rel[part])
        if judged.size:
            self.direction_worst = max(self.direction_worst, float(np.max(judged)))
        statuses = [Status.of_code(int(c)) for c in np.unique(code)]
        self.direction_status = worst([self.direction_status, *statuses])
        return off

    def status(self) -> Status:
        if self.problem or self.failed or self.direction_status is Status.FAIL:
            return Status.FAIL
        if self.unsure or self.direction_status is Status.INCONCLUSIVE:
            return Status.INCONCLUSIVE
        if self.kinks or self.direction_status is Status.KINK:
            return Status.KINK
        return Status.PASS

    def index(self, i: int, j: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
        return (tuple(int(k) for k in np.unravel_index(i, self.row_shape)),
                tuple(int(k) for k in np.unravel_index(j, self.col_shape)))

    def result(self, hint: str | None, threshold: float) -> BlockResult:
        status = self.status()
        worst = self.worst
        rel = worst[0] if worst else (self.direction_worst if self.directions else None)
        reason = None
        if status is Status.INCONCLUSIVE:
            reason = (f"{self.unsure} of {self.checked} compared elements could not be told "
                      f"apart from the numeric derivative's own error at threshold {threshold:g}")
        return BlockResult(
            rows=self.rows, cols=self.cols, row_shape=self.row_shape, col_shape=self.col_shape,
            status=status, checked=self.checked, failed=self.failed, kinks=self.kinks,
            inconclusive=self.unsure, max_rel_error=rel,
            max_abs_error=worst[1] if worst else None, worst_noise=worst[2] if worst else None,
            worst_index=self.index(worst[3], worst[4]) if worst else None,
            bad_indices=tuple(self.index(i, j) for i, j in self.bad),
            directions=self.directions, directions_off=self.directions_off,
            hint=self.problem or hint, reason=reason,
            error_map=self.rel if self.rel is not None and self.checked else None,
        )
