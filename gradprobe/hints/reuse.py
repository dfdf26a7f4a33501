"""Where the errors are: one slice right, repeated indices.

Each rule is decided from the pattern of failing and passing coordinates, never from whether
the analytic values are smaller than the numeric ones (with contributions of mixed signs a
partial sum can be larger than the whole).
"""

from __future__ import annotations

import numpy as np

from .evidence import Context, Evidence, averaged_fit

MOSTLY = 0.9  # share of the coordinates a pattern says are wrong that must fail
MIN_WRONG = 3  # fewer wrong coordinates land on the reused items by chance too often
NONZERO = 1e-3  # a gradient counts as present above this share of the tensor's largest


def _per(mask: np.ndarray, axis: int) -> np.ndarray:
    """``mask`` as (items along ``axis``, everything else)."""
    return np.moveaxis(mask, axis, 0).reshape(mask.shape[axis], -1)


def _present(e: Evidence, axis: int) -> np.ndarray:
    """Per item along ``axis``: does the numeric gradient there hold anything?"""
    values = np.abs(np.nan_to_num(_per(e.full(e.numeric), axis)))
    top = float(values.max()) if values.size else 0.0
    return values.max(axis=1) > NONZERO * top if top > 0 else np.zeros(values.shape[0], bool)


def _averaged(e: Evidence, axis: int, counts: np.ndarray) -> bool:
    """Does ``analytic = numeric / count`` (a mean over the reuses) explain the failure?"""
    shape = [1] * len(e.shape)
    shape[axis] = len(counts)
    divided = e.full(e.numeric) / np.maximum(counts, 1).reshape(shape)
    return averaged_fit(divided.reshape(-1)[e.flat], e)


def fits(e: Evidence, axis: int, counts: np.ndarray) -> bool:
    """Wrong only where ``counts`` >= 2 (mostly all of it there, 3 coordinates at least),
    right where it is 1, and some item used once carries a gradient, so that the pattern
    tells something; not when ``numeric / counts`` explains the values (a mean)."""
    per = _per(e.failed_mask(), axis)
    if per.sum() < MIN_WRONG:
        return False
    item_failed = per.any(axis=1)
    reused = counts >= 2
    if not item_failed.any() or (item_failed & ~reused).any():
        return False
    if per[reused].mean() < MOSTLY:
        return False
    return bool((_present(e, axis) & (counts == 1)).any()) and not _averaged(e, axis, counts)


def slice_hint(e: Evidence) -> str | None:
    """One slice right, zero elsewhere: one item handled, or a path back from it missing."""
    if not e.complete or not e.shape:
        return None
    failed = e.failed_mask()
    for axis, length in enumerate(e.shape):
        if length < 3 or failed.size // length < 2:  # a slice of one element says nothing
            continue
        slices = _per(failed, axis)
        right = np.flatnonzero(~slices.any(axis=1))
        if right.size != 1 or not np.delete(slices, right[0], axis=0).all():
            continue
        i = int(right[0])
        rest = np.delete(_per(e.full(e.analytic), axis), i, axis=0)
        if np.any(rest):  # the other items were computed, just wrongly: no model fits
            return None
        what = f"row {i}" if axis == 0 else f"index {i} along axis {axis}"
        head = f"right only in {what} and zero elsewhere: "
        loop = f"a loop or sum over axis {axis} is missing, so backward handles one item only"
        if 0 < i < length - 1:
            return head + loop
        return (f"{head}either {loop}, or the gradient is not carried back from that item to "
                "the others (a missing path back through time)")
    return None


def repeat_hint(e: Evidence, ctx: Context) -> str | None:
    """Wrong exactly at the items an integer input uses more than once."""
    if not e.complete or not e.shape:
        return None
    for name, idx in ctx.index_inputs.items():
        if idx.size == 0 or idx.min() < 0:
            continue
        for axis, length in enumerate(e.shape):
            if idx.max() >= length:
                continue
            counts = np.bincount(idx.reshape(-1), minlength=length)
            if fits(e, axis, counts):
                where = ("entries" if len(e.shape) == 1 else "rows" if axis == 0
                         else f"indices along axis {axis}")
                return (f"wrong exactly at the {where} that {name} uses more than once and right "
                        "where it uses them once: gradients are assigned instead of accumulated "
                        "there (use np.add.at, or += in a loop)")
    return None
