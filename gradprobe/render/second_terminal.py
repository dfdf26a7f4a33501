"""The terminal's part for second derivatives: a table of Hessian blocks under the gradient
table, and one line saying where an error enters."""

from __future__ import annotations

from collections.abc import Callable

from rich.console import RenderableType
from rich.table import Table
from rich.text import Text

from ..report.second import BlockResult, SecondOrderResult
from ..common.status import Status
from ..common.tensors import format_index
from .text import fmt

FORMS = {"hvp": "hvp", "hessian": "dense hessian", "autograd": "double backward"}
TITLES = ("Hessian block (rows × columns)", "compared", "worst rel", "± noise", "at", "status")


def _at(b: BlockResult) -> str:
    if b.worst_index is None:
        return "-"
    return f"{format_index(b.worst_index[0])}×{format_index(b.worst_index[1])}"


def _compared(b: BlockResult) -> str:
    text = f"{b.checked}/{b.size}"
    if b.directions:
        text += f" +{b.directions}dir" + (f"({b.directions_off} off)" if b.directions_off else "")
    return text


def block_table(so: SecondOrderResult, style: Callable[[str], str], box: object) -> RenderableType:
    grid = Table(box=box, show_edge=False, pad_edge=False, expand=False,  # type: ignore[arg-type]
                 title=f"second derivatives ({FORMS.get(so.form, so.form)})", title_justify="left")
    for title in TITLES:
        grid.add_column(title, no_wrap=True, overflow="fold",
                        justify="right" if title in ("worst rel", "± noise") else "left")
    for b in so.blocks:
        grid.add_row(b.name, _compared(b), fmt(b.max_rel_error), fmt(b.worst_noise), _at(b),
                     Text(b.status.value, style=style(b.status.value)))
    return grid


def block_notes(so: SecondOrderResult) -> list[str]:
    """The hints and reasons of blocks, one line each, for below the table."""
    out = []
    for b in so.blocks:
        if b.hint:
            out.append(f"hint for {b.name}: {b.hint}")
        elif b.reason:
            out.append(f"inconclusive {b.name}: {b.reason}")
    return out + [f"note: {note}" for note in so.notes]


def _pairs(pairs: tuple[tuple[str, str], ...]) -> str:
    return ", ".join(f"{r} × {c}" for r, c in pairs)


def enters_line(so: SecondOrderResult) -> str:
    """Where the error enters, the symmetry and the forward check, in one line."""
    parts = []
    failing = so.failing_blocks
    if so.error_enters_at == "hessian":
        parts.append("second derivatives: the error enters at the Hessian: "
                     f"{_pairs(tuple((b.rows, b.cols) for b in failing))} disagree with the "
                     "derivative of the gradient")
    elif so.error_enters_at == "gradient" and failing:
        parts.append("second derivatives: the error enters at the gradient: the Hessian agrees "
                     "with forward's second differences, so the gradient whose derivative it "
                     "misses is what is wrong")
    elif so.error_enters_at == "gradient":
        pairs = _pairs(so.forward.failing_pairs) if so.forward else ""
        parts.append("second derivatives: the error enters at the gradient: the Hessian is the "
                     "faithful derivative of backward's gradient, but forward's second "
                     f"differences disagree with it ({pairs})")
    else:
        counts = f"{sum(b.status is not Status.FAIL for b in so.blocks)} of {len(so.blocks)} blocks agree"
        parts.append(f"second derivatives: {counts}" + (f" ({so.status.value})" if so.status
                                                        is not Status.PASS else ""))
    if so.symmetric is Status.FAIL:
        parts.append(f"not symmetric: u·(Hv) ≠ v·(Hu) for {_pairs(so.asymmetric_pairs)}")
    else:
        parts.append(f"symmetric: {so.symmetric.value}")
    if so.forward is not None and so.forward.resolution is not None:
        parts.append(f"forward's second differences trusted to {so.forward.resolution:.1e} "
                     "relative (measured here)")
    elif so.forward is not None and so.forward.pairs:
        parts.append("forward's second differences too coarse here to decide")
    for error in so.errors:
        parts.append(error)
    return " · ".join(parts)
