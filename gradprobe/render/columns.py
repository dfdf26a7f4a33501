"""Which table columns fit a width: shorten headers, then drop columns by priority.

Pure layout arithmetic on cell texts. Numbers, names and indices are never wrapped; only the
hint wraps, and when even the essential columns leave it too little room it moves below the
table.
"""

from __future__ import annotations

from ..common.classes import dataclass

GAP = 3  # a column's padding and divider, as the tables are drawn
HINT_MIN = 20  # narrower than this, a hint column reads badly: hints go below the table
HINT_LINES = 3  # nor should the longest hint take more lines than this


@dataclass(frozen=True)
class Column:
    key: str
    title: str
    short: str
    justify: str = "left"


@dataclass(frozen=True)
class Layout:
    columns: tuple[Column, ...]
    short_titles: bool
    hints_inline: bool
    width: int  # the least width the table needs (the hint at its narrowest)


def natural(column: Column, cells: list[str], short: bool) -> int:
    title = column.short if short else column.title
    return max([len(title), *(len(c) for c in cells)])


def fit(columns: tuple[Column, ...], cells: dict[str, list[str]], width: int,
        drop_order: tuple[str, ...]) -> Layout:
    """The fullest layout of ``columns`` within ``width``.

    Tried in order: full titles with the hint in the table, full titles with the hints below
    it, then short titles and dropping ``drop_order`` one at a time (hints below).
    With no layout fitting, the fewest columns at their natural width (the table is then
    wider than ``width`` rather than split).
    """
    has_hint = "hint" in cells and any(cells["hint"])
    plain = tuple(c for c in columns if c.key != "hint")
    hint = next((c for c in columns if c.key == "hint"), None)
    # Titles depend on the width alone: a hint goes below the table before any title is
    # shortened for it, so the same console shows the same titles with or without hints.
    tries: list[tuple[tuple[str, ...], bool, bool]] = [((), False, has_hint)]
    if has_hint:
        tries.append(((), False, False))
    tries += [(drop_order[:k], True, False) for k in range(len(drop_order) + 1)]
    layout = None
    for dropped, short, inline in tries:
        kept = tuple(c for c in plain if c.key not in dropped)
        need = sum(natural(c, cells[c.key], short) for c in kept) + GAP * (len(kept) - 1)
        if inline and hint is not None:
            longest = max(len(h) for h in cells["hint"])
            room = min(longest, max(HINT_MIN, -(-longest // HINT_LINES)))
            total = need + GAP + max(room, len(hint.short if short else hint.title))
            layout = Layout(kept + (hint,), short, True, total)
        else:
            total = need
            layout = Layout(kept, short, False, need)
        if total <= width:
            return layout
    assert layout is not None
    return layout
