"""Number and shape formatting shared by the renderers, without rich."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ..report.model import TensorResult


def fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.1e}"


def shape_text(shape: tuple[int, ...]) -> str:
    return "x".join(str(n) for n in shape) if shape else "scalar"


def growth_text(growth: float | None) -> str:
    """A growth factor: ``×97``, ``×1.3``, ``×0.01``, ``×2.0e+05``."""
    if growth is None:
        return ""
    if growth >= 1e4:
        return f"×{growth:.1e}"
    return f"×{growth:.0f}" if growth >= 10 else f"×{growth:.2g}"


ARROWS = {"regressed": "↑", "worse": "↑", "better": "↓", "same": "=", "new": "+", "gone": "-"}


def change_cell(t: TensorResult) -> str:
    """How a tensor changed since the baseline, with an arrow and the growth factor
    (``↑ ×97 regressed``, ``↑ worse, was pass``, ``= ×1``, ``+ new``); empty without one."""
    b = t.baseline
    if b is None:
        return ""
    change = b.change.value
    growth = growth_text(b.growth)
    if change == "worse":
        return f"↑ worse, was {b.status}"
    return " ".join(part for part in (ARROWS[change], growth, "" if change == "same" else change) if part)
