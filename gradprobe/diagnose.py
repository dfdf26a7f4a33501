"""Hints for failing tensors (the rules live in :mod:`gradprobe.hints`)."""

from .hints import EXPLAINED, Context, Evidence, diagnose, hint_for, swapped_pairs

__all__ = ["EXPLAINED", "Context", "Evidence", "diagnose", "hint_for", "swapped_pairs"]
