"""Keeping the C allocator from handing memory back to the system after every forward call.

A check calls the user's forward thousands of times. Each call allocates temporaries and frees
them; with glibc's defaults, freeing the top of the heap past the trim threshold (128 KiB,
adjusted dynamically) returns it with ``brk``, and blocks above the mmap threshold are
``munmap``-ed, so the next call faults the same pages in again and most of the time is spent in
the kernel. :func:`keep_heap` sets, once per process (the main one and each worker), glibc's
``mallopt`` parameters so the memory stays mapped while the check runs:

- ``M_TRIM_THRESHOLD`` (-1): only a free top chunk larger than this is returned; 1 GiB.
- ``M_TOP_PAD`` (-2): extra bytes taken whenever the heap grows (and kept when it shrinks); 64 MiB.
- ``M_MMAP_THRESHOLD`` (-3): blocks above this get their own mapping; 32 MiB, the largest
  value glibc accepts on 64-bit systems, so temporaries up to that size reuse heap memory.

Setting a parameter explicitly also turns off glibc's dynamic adjustment of it (glibc manual,
"Malloc Tunable Parameters"). :func:`release_heap` (``malloc_trim(0)``) gives the free memory
back once a check is over. :func:`own_mappings` lowers the mmap threshold for a stage of a few
calls that allocates and frees whole-tensor arrays: each gets its own mapping, handed back
when freed, instead of holes in the heap that later arrays of other sizes do not fit. Off
glibc (macOS, Windows, musl) they all do nothing.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

M_TRIM_THRESHOLD, M_TOP_PAD, M_MMAP_THRESHOLD = -1, -2, -3
SETTINGS = {M_TRIM_THRESHOLD: 1 << 30, M_TOP_PAD: 64 << 20, M_MMAP_THRESHOLD: 32 << 20}

_libc: Any = None
_done = False


def _glibc() -> Any:
    global _libc
    if _libc is None:
        _libc = False
        if sys.platform.startswith("linux"):
            import ctypes

            try:
                libc = ctypes.CDLL(None)  # the process's own symbols, libc's among them
                if hasattr(libc, "mallopt") and hasattr(libc, "gnu_get_libc_version"):
                    _libc = libc
            except OSError:
                pass
    return _libc


def keep_heap() -> bool:
    """Set the parameters above once in this process; True when they are in force."""
    global _done
    libc = _glibc()
    if not libc:
        return False
    if not _done:
        _done = all(libc.mallopt(param, value) == 1 for param, value in SETTINGS.items())
    return _done


def release_heap() -> None:
    """Return the heap's free memory to the system now (glibc only)."""
    libc = _glibc()
    if libc and hasattr(libc, "malloc_trim"):
        libc.malloc_trim(0)


OWN_MAPPING = 1 << 20  # bytes: inside own_mappings, blocks this large get their own mapping


@contextmanager
def own_mappings() -> Iterator[None]:
    """Blocks of OWN_MAPPING bytes or more allocated inside get their own mapping (returned to
    the system when freed), and the heap's free pages go back first (the mappings do not
    reuse them); keep_heap's threshold is put back when the outermost one ends. Only where
    keep_heap's settings are in force (else glibc's own dynamic threshold is left alone)."""
    global _inside
    libc = _glibc()
    if not (libc and _done):
        yield
        return
    if _inside == 0:
        release_heap()
        libc.mallopt(M_MMAP_THRESHOLD, OWN_MAPPING)
    _inside += 1
    try:
        yield
    finally:
        _inside -= 1
        if _inside == 0:
            libc.mallopt(M_MMAP_THRESHOLD, SETTINGS[M_MMAP_THRESHOLD])


_inside = 0  # own_mappings open now (nested ones leave the threshold to the outermost)
