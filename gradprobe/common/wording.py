"""Small helpers for messages: counts with the right noun form."""

from __future__ import annotations

IRREGULAR = {"index": "indices", "axis": "axes"}


def plural(n: int, noun: str) -> str:
    """``plural(1, "tensor")`` -> ``"1 tensor"``; ``plural(3, "tensor")`` -> ``"3 tensors"``."""
    if n == 1:
        return f"{n} {noun}"
    return f"{n} {IRREGULAR.get(noun, noun + 's')}"


def verb(n: int, singular: str, plural_form: str) -> str:
    """The verb form agreeing with a count: ``verb(1, "disagrees", "disagree")``."""
    return singular if n == 1 else plural_form
