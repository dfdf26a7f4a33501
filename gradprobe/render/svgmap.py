"""Inline SVG maps of per-element relative error, for the HTML report.

Tensors are folded to two dimensions as ``--map`` folds them and reduced to at most
MAX_ROWS x MAX_COLS blocks (each block shows its worst element), so a map stays small
whatever the tensor's size. Each cell is coloured by how many decades its relative error
lies above the threshold, on a sequential palette defined below whose lightness falls
steadily from level to level: it reads in greyscale print and does not rest on telling
red from green. Cells of one colour are drawn as a single path, runs merged.
"""

from __future__ import annotations

from html import escape

import numpy as np

from ..common.classes import dataclass
from ..report.model import TensorResult
from .heatmap import folded, reduce

MAX_ROWS, MAX_COLS = 64, 128
MAP_WIDTH, MAP_HEIGHT = 640, 480  # px a large map is drawn across and down
CELL_MAX = 24  # px, the largest cell (small tensors)

# The palette, as data. WITHIN: at or below the threshold. LEVELS[k]: relative error between
# 10**k and 10**(k+1) times the threshold (the last: 10**7 times and beyond). CIE L* of each
# colour falls from level to level (88.6, 83.1, 74.5, 65.9, 57.3, 47.4, 37.3, 26.8, 15.3);
# cells nothing was checked in stay white (L* 100).
UNCHECKED = "#ffffff"
WITHIN = "#d5e0e8"
LEVELS = ("#f0cc4e", "#efaa45", "#e58a42", "#d66b43", "#bd4b4b", "#983356", "#6b2358", "#3d1545")
KINK = "#1b8a9a"  # outline of coordinates at a kink (drawn as within the threshold)


@dataclass(frozen=True)
class Picture:
    svg: str
    how: str  # how the tensor was laid out, in a sentence
    block: tuple[int, int]  # elements per cell (rows, columns)


def levels(grid: np.ndarray, threshold: float) -> np.ndarray:
    """Per cell: -2 not checked, -1 within the threshold, k >= 0 the decade above it."""
    out = np.full(grid.shape, -2, dtype=np.int64)
    checked = ~np.isnan(grid)
    with np.errstate(divide="ignore", invalid="ignore"):
        decades = np.floor(np.log10(np.where(checked, grid, 1.0) / threshold))
    above = checked & (grid > threshold)
    out[checked & ~above] = -1
    out[above] = np.clip(decades[above], 0, len(LEVELS) - 1).astype(np.int64)
    return out


def _runs(row: np.ndarray) -> list[tuple[int, int, int]]:
    """(start, length, level) of each run of equal levels in ``row``."""
    edges = np.flatnonzero(np.diff(row)) + 1
    starts = np.concatenate(([0], edges))
    ends = np.concatenate((edges, [row.size]))
    return [(int(s), int(e - s), int(row[s])) for s, e in zip(starts, ends)]


def _paths(cells: np.ndarray) -> dict[int, list[str]]:
    paths: dict[int, list[str]] = {}
    for r in range(cells.shape[0]):
        for start, length, level in _runs(cells[r]):
            paths.setdefault(level, []).append(f"M{start} {r}h{length}v1h-{length}z")
    return paths


def _fill(level: int) -> str:
    if level == -2:
        return UNCHECKED
    return WITHIN if level == -1 else LEVELS[level]


def _kink_marks(t: TensorResult, block: tuple[int, int], cols: int) -> list[str]:
    """Outlines of the listed kink coordinates (small maps only: one element per cell)."""
    if block != (1, 1) or not t.kink_indices or not t.shape:
        return []
    marks = []
    for index in t.kink_indices:
        flat = int(np.ravel_multi_index(index, t.shape))
        r, c = divmod(flat, cols)
        marks.append(f"M{c + 0.15:g} {r + 0.15:g}h0.7v0.7h-0.7z")
    return marks


def tensor_svg(t: TensorResult, threshold: float) -> Picture:
    """The map of one tensor as an ``<svg>`` element, one user unit per cell."""
    grid, how = folded(t)
    if t.kink_indices and t.shape:  # judged by the kink rule, not by their relative error
        grid = grid.copy()
        grid.reshape(-1)[np.ravel_multi_index(tuple(np.array(t.kink_indices).T), t.shape)] = 0.0
    grid, row_block, col_block = reduce(grid, MAX_ROWS, MAX_COLS)
    cells = levels(grid, threshold)
    rows, cols = cells.shape
    unit = max(2, min(CELL_MAX, MAP_WIDTH // cols, MAP_HEIGHT // rows))
    parts = [
        f'<svg class="gp-map" xmlns="http://www.w3.org/2000/svg" role="img" '
        f'width="{cols * unit}" height="{rows * unit}" viewBox="0 0 {cols} {rows}" '
        f'shape-rendering="crispEdges" style="background:{UNCHECKED}" aria-label="relative error map of {escape(t.name)}">',
        f"<title>{escape(t.name)}: relative error per element</title>",
    ]
    for level, runs in sorted(_paths(cells).items()):
        if level == -2:  # not checked: the map's white background shows through
            continue
        parts.append(f'<path class="gp-l{level}" fill="{_fill(level)}" d="{"".join(runs)}"/>')
    if len(t.shape) > 2 and row_block == 1 and rows > t.shape[-2]:  # where folded axes step
        edges = "".join(f"M0 {r}h{cols}" for r in range(t.shape[-2], rows, t.shape[-2]))
        parts.append(f'<path class="gp-fold" stroke="#1d232a" stroke-width="{1.5 / unit:.3g}" d="{edges}"/>')
    marks = _kink_marks(t, (row_block, col_block), cols)
    if marks:
        parts.append(f'<path class="gp-kink" fill="none" stroke="{KINK}" stroke-width="0.12" '
                     f'd="{"".join(marks)}"/>')
    parts.append("</svg>")
    return Picture("".join(parts), how, (row_block, col_block))


SUPERSCRIPT = str.maketrans("0123456789", "⁰¹²³⁴⁵⁶⁷⁸⁹")


def _decade(k: int) -> str:
    """``1×``, ``10×``, ``10²×``, ... the threshold."""
    return "1×" if k == 0 else "10×" if k == 1 else "10" + str(k).translate(SUPERSCRIPT) + "×"


def legend() -> str:
    """The colour scale as a row of labelled swatches (an inline SVG)."""
    labels = [("not checked", UNCHECKED, "#555"), ("≤ threshold", WITHIN, "#555")]
    labels += [(("≥ " if k == len(LEVELS) - 1 else "") + _decade(k), colour, "#555")
               for k, colour in enumerate(LEVELS)]
    labels.append(("at a kink", WITHIN, KINK))
    step, size = 80, 18
    parts = [f'<svg class="gp-legend" xmlns="http://www.w3.org/2000/svg" role="img" '
             f'width="{step * len(labels)}" height="44" aria-label="colour scale">',
             "<title>relative error over the threshold, by decade</title>"]
    for k, (label, fill, stroke) in enumerate(labels):
        x = k * step
        width = 1.5 if stroke == KINK else 0.5
        parts.append(f'<rect x="{x + 1}" y="2" width="{size * 2}" height="{size}" fill="{fill}" '
                     f'stroke="{stroke}" stroke-width="{width}"/>')
        parts.append(f'<text x="{x}" y="36" font-size="11">{escape(label)}</text>')
    parts.append("</svg>")
    return "".join(parts)
