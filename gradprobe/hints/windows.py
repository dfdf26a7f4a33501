"""Overlapping windows: a convolution's input gradient assigned per window.

With the windows of a 1-D convolution (size ``k``, stride ``s``, no padding) written back one
at a time by ``dx[j*s : j*s + k] = r[j] * w`` instead of ``+=``, each element keeps the
contribution of the last window that covers it. So the analytic gradient is wrong exactly where
windows overlap, and it is made of one window's contribution per element: from it alone the
upstream values ``r`` and the kernel ``w`` can be read back (up to a common scale), and their
full sum must give the numeric gradient. Both are required, so a random error does not fit
(none of 3000 seeded random error patterns did).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from .evidence import EXPLAINED, Evidence, norm

MAX_WINDOW = 32  # largest window tried


def _geometries(item_failed: np.ndarray) -> Iterator[tuple[int, int]]:
    """(size, stride) of windows with no padding whose overlaps are exactly the failing
    elements. Windows start at 0, stride, 2*stride...: the first failing element is the second
    window's start, and the first window ends within the first failing run (where runs merge,
    several sizes give the same overlaps)."""
    failing = np.flatnonzero(item_failed)
    length = item_failed.size
    if failing.size == 0 or failing[0] < 1:
        return
    stride = int(failing[0])
    run_end = stride
    while run_end + 1 < length and item_failed[run_end + 1]:
        run_end += 1
    for size in range(stride + 1, min(run_end + 1, length - 1, MAX_WINDOW) + 1):
        windows = (length - size) // stride + 1
        diff = np.zeros(length + 1, dtype=np.int64)
        starts = np.arange(windows) * stride
        np.add.at(diff, starts, 1)
        np.add.at(diff, starts + size, -1)
        counts = np.cumsum(diff)[:length]
        if np.array_equal(counts >= 2, item_failed):
            yield size, stride


def _summed(rows: np.ndarray, size: int, stride: int, last_wins: bool) -> np.ndarray | None:
    """The full sum over windows rebuilt from per-window values (one row per slice), or None."""
    length = rows.shape[1]
    windows = (length - size) // stride + 1
    starts = np.arange(windows) * stride
    if last_wins:  # window j is the last to write its first element; the last window is whole
        upstream = rows[:, starts]
        ref = rows[:, starts[-1]]
        kernel = rows[:, starts[-1]: starts[-1] + size]
    else:  # window j is the first to write its last element; the first window is whole
        upstream = rows[:, starts + size - 1]
        ref = rows[:, size - 1]
        kernel = rows[:, :size]
    if np.any(ref == 0):
        return None
    kernel = kernel / ref[:, None]
    spread = np.zeros((rows.shape[0], starts[-1] + 1))
    spread[:, starts] = upstream
    out = np.zeros_like(rows)
    for row in range(rows.shape[0]):  # each window's values placed at its start, convolved
        full = np.convolve(spread[row], kernel[row])
        out[row, : full.size] = full
    return out


def _rebuilds(rebuilt: np.ndarray, analytic: np.ndarray, numeric: np.ndarray, failed: np.ndarray) -> bool:
    """The sum rebuilt from the analytic values gives the numeric gradient to within 5% of
    the discrepancy, over the tensor and on every failing element."""
    gap = np.abs(analytic - numeric)
    off = np.abs(rebuilt - numeric)
    return bool(norm(off) <= EXPLAINED * norm(gap) and np.all(off[failed] <= EXPLAINED * gap[failed]))


def window_hint(e: Evidence) -> str | None:
    """Wrong exactly where windows along the last axis overlap, each element holding one
    window's contribution whose sum over windows is the numeric gradient."""
    if not e.complete or not e.shape or e.shape[-1] < 4:
        return None
    item_failed = np.asarray(e.failed_mask().reshape(-1, e.shape[-1]).any(axis=0))
    analytic = e.full(e.analytic).reshape(-1, e.shape[-1])
    numeric = e.full(e.numeric).reshape(-1, e.shape[-1])
    failed = e.failed_mask().reshape(-1, e.shape[-1])
    for size, stride in _geometries(item_failed):
        for last_wins in (True, False):
            rebuilt = _summed(analytic, size, stride, last_wins)
            if rebuilt is not None and _rebuilds(rebuilt, analytic, numeric, failed):
                where = "" if len(e.shape) == 1 else " along the last axis"
                return (f"wrong exactly where sliding windows{where} overlap, each element "
                        "holding one window's share: the input gradient is assigned per window "
                        "instead of accumulated (+= over the windows)")
    return None
