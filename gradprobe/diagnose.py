"""Hints for failing tensors (the rules live in :mod:`gradprobe.hints`)."""

from .hints import EXPLAINED, Evidence, diagnose, hint_for, swapped_pairs
from .hints import Context as HintContext

__all__ = ["EXPLAINED", "Evidence", "HintContext", "diagnose", "hint_for", "swapped_pairs"]
