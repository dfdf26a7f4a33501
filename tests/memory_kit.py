"""Memory measured by the tests: what numpy and Python allocate during one piece of work."""

from __future__ import annotations

import gc
import tracemalloc
from collections.abc import Callable
from typing import Any


def traced_peak(work: Callable[[], Any]) -> tuple[float, Any]:
    """The peak traced allocation while ``work`` runs, above what was live before it, and
    what it returned."""
    gc.collect()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        done = work()
        return tracemalloc.get_traced_memory()[1] - before, done
    finally:
        tracemalloc.stop()
