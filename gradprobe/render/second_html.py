"""The HTML page's part for second derivatives: a block map (row tensors × column tensors,
each cell coloured by the block's worst relative error) and an error map per failing block."""

from __future__ import annotations

from html import escape

import numpy as np

from ..report.second import BlockResult, SecondOrderResult
from ..common.status import Status
from .heatmap import reduce
from .svgmap import CELL_MAX, KINK, LEVELS, MAP_HEIGHT, MAP_WIDTH, MAX_COLS, MAX_ROWS, UNCHECKED, WITHIN, levels


def _e(value: object) -> str:
    return escape(str(value), quote=True)


def _ink(fill: str) -> str:
    """Text colour readable on ``fill``: white on the darker half of the palette."""
    return "#ffffff" if fill in LEVELS[4:] else "#1d232a"


def _fill(b: BlockResult, threshold: float) -> str:
    if b.status is Status.KINK:
        return WITHIN
    if b.max_rel_error is None:
        return UNCHECKED
    level = int(levels(np.array([[b.max_rel_error]]), threshold)[0, 0])
    return WITHIN if level == -1 else LEVELS[level] if level >= 0 else UNCHECKED


def _anchor(k: int, b: BlockResult) -> str:
    return f"block-{k}-" + "".join(ch if ch.isalnum() else f"_{ord(ch):x}" for ch in b.name)


def block_map(so: SecondOrderResult, threshold: float, k: int) -> str:
    names = list(dict.fromkeys(b.rows for b in so.blocks))
    by_pair = {(b.rows, b.cols): b for b in so.blocks}
    head = "".join(f'<th scope="col" class="name">{_e(n)}</th>' for n in names)
    rows = []
    for r in names:
        cells = []
        for c in names:
            b = by_pair.get((r, c))
            if b is None:
                cells.append("<td></td>")
                continue
            rel = "–" if b.max_rel_error is None else f"{b.max_rel_error:.1e}"
            text = f"{_e(b.status.value)}<br>{rel}"
            if b.status is Status.FAIL and b.error_map is not None:
                text = f'<a href="#{_anchor(k, b)}" style="color:inherit">{text}</a>'
            outline = f"outline:2px solid {KINK};" if b.status is Status.KINK else ""
            cells.append(f'<td class="gp-block gp-{_e(b.status.value)}" data-block="{_e(b.name)}" '
                         f'style="background:{_fill(b, threshold)};color:{_ink(_fill(b, threshold))};'
                         f'padding:.3em .7em;border:1px solid #fff;{outline}" '
                         f'title="{_e(b.name)}: {_e(b.hint or b.status.value)}">{text}</td>')
        rows.append(f'<tr><th scope="row" class="name">{_e(r)}</th>{"".join(cells)}</tr>')
    return ('<table class="gp-blockmap" style="border-collapse:collapse;text-align:center;'
            'font-variant-numeric:tabular-nums;margin:.5em 0"><caption>Hessian blocks: rows × columns of tensors, '
            'coloured by the worst relative error of each block (the colours of the maps '
            f'below)</caption><thead><tr><th></th>{head}</tr></thead><tbody>{"".join(rows)}'
            "</tbody></table>")


def _block_svg(b: BlockResult, threshold: float) -> tuple[str, tuple[int, int]]:
    grid = np.asarray(b.error_map, dtype=float).reshape(b.error_map.shape)
    grid, row_block, col_block = reduce(grid, MAX_ROWS, MAX_COLS)
    cells = levels(grid, threshold)
    rows, cols = cells.shape
    unit = max(2, min(CELL_MAX, MAP_WIDTH // cols, MAP_HEIGHT // rows))
    paths: dict[int, list[str]] = {}
    for r in range(rows):
        for c in range(cols):
            level = int(cells[r, c])
            if level != -2:
                paths.setdefault(level, []).append(f"M{c} {r}h1v1h-1z")
    parts = [f'<svg class="gp-map" xmlns="http://www.w3.org/2000/svg" role="img" '
             f'width="{cols * unit}" height="{rows * unit}" viewBox="0 0 {cols} {rows}" '
             f'shape-rendering="crispEdges" style="background:{UNCHECKED}" '
             f'aria-label="relative error map of block {_e(b.name)}">',
             f"<title>{_e(b.name)}: relative error per element</title>"]
    for level, runs in sorted(paths.items()):
        fill = WITHIN if level == -1 else LEVELS[level]
        parts.append(f'<path class="gp-l{level}" fill="{fill}" d="{"".join(runs)}"/>')
    parts.append("</svg>")
    return "".join(parts), (row_block, col_block)


def block_figures(so: SecondOrderResult, threshold: float, k: int) -> str:
    out = []
    for b in so.failing_blocks:
        if b.error_map is None:
            out.append(f'<p class="nomap" data-block="{_e(b.name)}"><strong>{_e(b.name)}</strong>: '
                       f"no map ({_e(b.hint or 'the block is too large to keep every element')}).</p>")
            continue
        svg, (rb, cb) = _block_svg(b, threshold)
        per = f"; each cell shows the worst of {rb} × {cb} elements" if rb * cb > 1 else ""
        caption = (f"<figcaption><strong>{_e(b.name)}</strong>: rows are the elements of "
                   f"{_e(b.rows)}, columns those of {_e(b.cols)} (row-major){per}; "
                   f"{b.checked:,} of {b.size:,} elements compared"
                   f"{'; hint: ' + _e(b.hint) if b.hint else ''}.</figcaption>")
        out.append(f'<figure class="gp-figure" id="{_anchor(k, b)}" data-block="{_e(b.name)}">'
                   f"{caption}{svg}</figure>")
    return "".join(out)


def second_order_section(so: SecondOrderResult, threshold: float, k: int) -> str:
    from .second_terminal import enters_line  # the same sentence as the terminal's

    return (f'<h3>Second derivatives ({_e(so.form)}): {_e(so.status.value)}</h3>'
            f'<p class="enters">{_e(enters_line(so))}</p>'
            + "".join(f'<p class="note">note: {_e(n)}</p>' for n in so.notes)
            + block_map(so, threshold, k) + block_figures(so, threshold, k))
