"""glibc heap settings for the many forward calls of a check."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from gradprobe.common.heap import keep_heap, release_heap

GLIBC = sys.platform.startswith("linux")
ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.skipif(not GLIBC, reason="glibc's mallopt")
def test_the_heap_settings_take_on_glibc():
    """mallopt accepts each value (it returns 1 on success), once per process."""
    assert keep_heap() is True and keep_heap() is True
    release_heap()


@pytest.mark.skipif(not GLIBC, reason="glibc's mallopt")
def test_freed_temporaries_stay_mapped():
    """After keep_heap, freeing a 4 MB temporary does not shrink the heap (common practice:
    glibc returns a free top chunk above M_TRIM_THRESHOLD with brk)."""
    probe = (
        "import ctypes, numpy as np, sys\n"
        "from gradprobe.common.heap import keep_heap\n"
        "if sys.argv[1] == 'keep': keep_heap()\n"
        "sbrk = ctypes.CDLL(None).sbrk; sbrk.restype = ctypes.c_void_p\n"
        "shrunk = 0\n"
        "for _ in range(50):\n"
        "    parts = [np.ones(2_000) for _ in range(250)]\n"
        "    top = sbrk(0); del parts\n"
        "    shrunk += sbrk(0) < top\n"
        "print(shrunk)\n")
    def shrinks(mode: str) -> int:
        done = subprocess.run([sys.executable, "-c", probe, mode], capture_output=True, text=True,
                              check=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
        return int(done.stdout)

    assert shrinks("default") > 0  # the control: glibc's defaults give the memory back
    assert shrinks("keep") == 0


@pytest.mark.skipif(not GLIBC, reason="glibc's mallopt and mallinfo2")
def test_inside_own_mappings_a_large_block_gets_its_own_mapping_and_is_handed_back():
    """glibc's mallinfo2: ``hblkhd`` counts the bytes of blocks in their own mappings (glibc
    manual, "Statistics for Memory Allocation with malloc"). With keep_heap's threshold (32
    MiB) a 4 MiB array is carved from the heap; inside own_mappings it is mapped on its own
    and unmapped when freed; the threshold is keep_heap's again afterwards, also after
    nested uses."""
    probe = (
        "import ctypes, numpy as np\n"
        "from gradprobe.common.heap import keep_heap, own_mappings\n"
        "class Info(ctypes.Structure):\n"
        "    _fields_ = [(n, ctypes.c_size_t) for n in 'arena ordblks smblks hblks hblkhd usmblks "
        "fsmblks uordblks fordblks keepcost'.split()]\n"
        "libc = ctypes.CDLL(None); libc.mallinfo2.restype = Info\n"
        "mapped = lambda: libc.mallinfo2().hblkhd\n"
        "keep_heap()\n"
        "def grows():\n"
        "    before = mapped(); a = np.ones(1 << 19); during = mapped(); del a\n"
        "    return during - before >= 4 << 20, mapped() == before\n"
        "out = [grows()]\n"
        "with own_mappings():\n"
        "    with own_mappings():\n"
        "        pass\n"
        "    out.append(grows())\n"
        "out.append(grows())\n"
        "print(out)\n")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.stdout.strip() == "[(False, True), (True, True), (False, True)]", done.stdout
