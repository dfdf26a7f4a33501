"""The one verdict vocabulary of gradprobe, ordered from best to worst.

``Status`` is a ``str`` enum, so JSON output carries the plain strings of the protocol
(``pass``, ``kink``, ``inconclusive``, ``fail``). Statuses compare by severity
(``Status.PASS < Status.FAIL``); :func:`worst` takes the worst of several. The engine keeps
per-coordinate verdicts in int8 arrays: the codes ``PASS`` ... ``FAIL`` below are each
status's :attr:`Status.code` (its rank), and :meth:`Status.of_code` maps one back.
"""

from __future__ import annotations

from collections.abc import Iterable
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
    def code(self) -> int:
        """0 for pass up to 3 for fail: the severity, and the engine's int8 code."""
        return _ORDER.index(self)

    @classmethod
    def of_code(cls, code: int) -> Status:
        """The status of an engine code."""
        return _ORDER[int(code)]

    def _rank_of(self, other: object) -> int:
        if not isinstance(other, Status):
            raise TypeError(f"a Status compares with a Status, not {type(other).__name__}")
        return other.code

    def __lt__(self, other: object) -> bool:
        return self.code < self._rank_of(other)

    def __le__(self, other: object) -> bool:
        return self.code <= self._rank_of(other)

    def __gt__(self, other: object) -> bool:
        return self.code > self._rank_of(other)

    def __ge__(self, other: object) -> bool:
        return self.code >= self._rank_of(other)

    __hash__ = str.__hash__


_ORDER = (Status.PASS, Status.KINK, Status.INCONCLUSIVE, Status.FAIL)

# The engine's per-coordinate codes (int8 arrays), derived from the order above.
PASS, KINK, INCONCLUSIVE, FAIL = (s.code for s in _ORDER)


def worst(statuses: Iterable[Status]) -> Status:
    """The worst of ``statuses`` (pass when there are none)."""
    return max(statuses, default=Status.PASS)
