"""The engine's per-coordinate verdict codes (int8 arrays) and their report names."""

from __future__ import annotations

PASS, KINK, INCONCLUSIVE, FAIL = 0, 1, 2, 3
STATUS_NAMES = {PASS: "pass", KINK: "kink", INCONCLUSIVE: "inconclusive", FAIL: "fail"}
