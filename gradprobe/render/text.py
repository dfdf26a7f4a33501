"""Number and shape formatting shared by the renderers, without rich."""

from __future__ import annotations


def fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.1e}"


def shape_text(shape: tuple[int, ...]) -> str:
    return "x".join(str(n) for n in shape) if shape else "scalar"
