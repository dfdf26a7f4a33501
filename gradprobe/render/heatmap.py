"""A compact per-element map of relative error for failing tensors (``--map``).

1-D and 2-D tensors are drawn as they are; higher dimensions are folded to 2-D (rows run
over all axes but the last, columns over the last) and the folding is stated. A map that fits
(up to FULL_ROWS rows and the columns the width allows) is drawn element by element; larger
ones are reduced to blocks, each showing its worst element. Each cell is a character of a ramp
by how many decades the error is above the threshold, so the map reads without colour.
"""

from __future__ import annotations

import numpy as np
from rich.text import Text

from ..report.model import Report, TensorResult
from ..common.wording import plural

UNCHECKED, WITHIN = " ", "."
RAMP = ":-=+*#%@"  # 1x, 10x, 100x, ... 1e7x the threshold and beyond
COLOURS = ("yellow", "yellow", "dark_orange", "dark_orange", "red", "red", "bold red", "bold red")
MAX_ROWS, MAX_COLS = 24, 64  # the size a large map is reduced to
FULL_ROWS = 64  # maps up to this many rows (and as many columns as fit) are not reduced


def fold(shape: tuple[int, ...]) -> tuple[int, int, str]:
    """Rows, columns and a sentence on how ``shape`` was laid out in two dimensions."""
    if len(shape) == 0:
        return 1, 1, "a scalar"
    if len(shape) == 1:
        return 1, shape[0], f"{plural(shape[0], 'element')} in one row"
    if len(shape) == 2:
        return shape[0], shape[1], f"{plural(shape[0], 'row')} x {plural(shape[1], 'column')}"
    rows = int(np.prod(shape[:-1]))
    last = len(shape) - 1
    return rows, shape[-1], (
        f"{shape} folded to {rows} x {shape[-1]}: rows run over axes 0-{last - 1}, "
        f"columns over axis {last}"
    )


def _blocks(values: np.ndarray, limit: int, axis: int) -> tuple[np.ndarray, int]:
    n = values.shape[axis]
    size = -(-n // limit)  # ceiling division
    if size == 1:
        return values, 1
    pad = size * (-(-n // size)) - n
    widths = [(0, 0), (0, 0)]
    widths[axis] = (0, pad)
    padded = np.pad(values, widths, constant_values=np.nan)
    if axis == 0:
        shaped = padded.reshape(-1, size, padded.shape[1])
        return _nanmax(shaped, 1), size
    shaped = padded.reshape(padded.shape[0], -1, size)
    return _nanmax(shaped, 2), size


def reduce(grid: np.ndarray, max_rows: int, max_cols: int) -> tuple[np.ndarray, int, int]:
    """``grid`` reduced to at most ``max_rows`` x ``max_cols`` blocks (each its worst
    element, NaN where nothing in it was checked), and the block height and width."""
    grid, row_block = _blocks(grid, max_rows, 0)
    grid, col_block = _blocks(grid, max_cols, 1)
    return grid, row_block, col_block


def folded(t: TensorResult) -> tuple[np.ndarray, str]:
    """The tensor's per-element relative errors laid out in two dimensions, and how."""
    errors = t.error_map if t.error_map is not None else np.full(t.shape, np.nan)
    rows, cols, how = fold(t.shape)
    return np.asarray(errors, dtype=float).reshape(rows, cols), how


def _nanmax(a: np.ndarray, axis: int) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        filled = np.where(np.isnan(a), -np.inf, a).max(axis=axis)
    return np.where(np.isneginf(filled), np.nan, filled)


def cell(rel: float, threshold: float) -> tuple[str, int | None]:
    """The character for one relative error, and its ramp level (None: not on the ramp)."""
    if np.isnan(rel):
        return UNCHECKED, None
    if rel <= threshold:
        return WITHIN, None
    level = min(int(np.floor(np.log10(rel / threshold))), len(RAMP) - 1)
    return RAMP[max(level, 0)], max(level, 0)


def tensor_map(t: TensorResult, threshold: float, colour: bool, width: int = 120) -> Text:
    """The map of one tensor, with a title line and the folding stated; rows fit ``width``."""
    grid, how = folded(t)
    cols = max(8, min(MAX_COLS, width - 2))
    if grid.shape[0] <= FULL_ROWS and grid.shape[1] <= width - 2:
        row_block = col_block = 1
    else:
        grid, row_block, col_block = reduce(grid, MAX_ROWS, cols)
    blocks = f"; each cell is the worst of {row_block} x {col_block} elements" if row_block * col_block > 1 else ""
    out = Text(f"{t.name}: {how}{blocks}\n")
    for r in range(grid.shape[0]):
        if r:
            out.append("\n")
        out.append("  ")
        for c in range(grid.shape[1]):
            char, level = cell(grid[r, c], threshold)
            style = COLOURS[level] if colour and level is not None else ("green" if colour and char == WITHIN else "")
            out.append(char, style=style)
    return out


def legend() -> str:
    steps = "  ".join(f"'{ch}' {10 ** k:g}x" for k, ch in enumerate(RAMP))
    return (f"map: '{UNCHECKED}' not checked  '{WITHIN}' within the threshold  then by relative "
            f"error over the threshold: {steps} and above")


def maps(report: Report, colour: bool, width: int = 120) -> list[Text]:
    """Maps of every failing tensor that has per-element errors, and the legend."""
    drawn = [tensor_map(t, report.threshold, colour, width) for t in report.failing_tensors
             if t.error_map is not None and t.checked]
    return drawn + [Text(legend())] if drawn else []
