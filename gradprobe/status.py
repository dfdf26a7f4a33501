"""The verdict vocabulary shared by the report model, the renderers and the pytest plugin.

``Status`` is a ``str`` enum, so ``status == "fail"`` and JSON output keep working with the
plain strings of the protocol.
"""

from __future__ import annotations

from enum import Enum


class Status(str, Enum):
    """What a check concluded about one tensor or coordinate, from best to worst."""

    PASS = "pass"
    KINK = "kink"  # the analytic value is a valid one-sided derivative at a kink
    INCONCLUSIVE = "inconclusive"  # numeric noise too large to tell
    FAIL = "fail"

    def __str__(self) -> str:
        return self.value

    @property
    def rank(self) -> int:
        """0 for pass up to 3 for fail, to take the worst of several."""
        return ORDER.index(self)


ORDER = (Status.PASS, Status.KINK, Status.INCONCLUSIVE, Status.FAIL)


def worst(statuses: list[Status] | tuple[Status, ...]) -> Status:
    """The worst of ``statuses`` (pass when there are none)."""
    return max(statuses, key=lambda s: s.rank, default=Status.PASS)
