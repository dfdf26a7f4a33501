"""The engine's per-coordinate verdict codes, kept in int8 arrays (engine/summary.py maps
them to :class:`gradprobe.status.Status`; their order is that of severity)."""

from __future__ import annotations

PASS, KINK, INCONCLUSIVE, FAIL = 0, 1, 2, 3
