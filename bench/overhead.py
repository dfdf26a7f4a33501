"""Overhead of a gradprobe full sweep against a bare numpy central-difference loop.

Run by hand: ``python bench/overhead.py``. Two forwards from ``overhead_cases.py``: a cheap
one (about 10 us) and a heavier one (about 1 ms). Three comparisons, each alternating the two
sides and printing the median ratio of wall time and of CPU time:

1. in process, fresh: gradprobe's full sweep against a loop making exactly as many forward
   calls (perturb, call, restore). Goal: at most 1.2 for the heavier forward.
2. in process, after other work (a large allocation pattern and other checks first).
3. end to end: ``python -m gradprobe check bench/overhead_cases.py:cheap -q`` against
   ``python bench/overhead_cases.py cheap N`` in fresh processes. Goal: at most 1.5 for the
   cheap forward. The heavier one shows the heap settings: a bare loop in a fresh process
   keeps glibc's defaults and pays for them on every call.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from overhead_cases import SIZES, bare_loop, make_case

from gradprobe import probe, render_text

Timing = tuple[float, float]  # wall, cpu


def timed(fn: Callable[[], object]) -> Timing:
    wall, cpu = time.perf_counter(), time.process_time()
    fn()
    return time.perf_counter() - wall, time.process_time() - cpu


def timed_child(args: list[str]) -> Timing:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    wall = time.perf_counter()
    subprocess.run(args, check=True, stdout=subprocess.DEVNULL, cwd=HERE.parent,
                   env={**os.environ, "PYTHONPATH": str(HERE.parent)})
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return time.perf_counter() - wall, cpu


def paired(first: Callable[[], Timing], second: Callable[[], Timing], repeats: int) -> str:
    """Alternate the two sides ``repeats`` times; the median ratios of wall and CPU time."""
    a, b = [], []
    for k in range(repeats):
        if k % 2:  # alternate which side goes first, so drift hits both alike
            b.append(second())
            a.append(first())
        else:
            a.append(first())
            b.append(second())
    wall = sorted(x[0] / y[0] for x, y in zip(a, b))[repeats // 2]
    cpu = sorted(x[1] / max(y[1], 1e-9) for x, y in zip(a, b))[repeats // 2]
    best_a, best_b = min(x[0] for x in a), min(y[0] for y in b)
    return (f"gradprobe {best_a:7.3f} s  bare {best_b:7.3f} s  median ratio wall {wall:5.2f} "
            f"cpu {cpu:5.2f} over {repeats} alternating pairs")


def in_process(label: str, repeats: int) -> None:
    case = make_case(*SIZES[label])
    start = time.perf_counter()
    for _ in range(50):
        case.forward(case.params, case.inputs)
    per_call = (time.perf_counter() - start) / 50
    report = probe(case.forward, case.backward, case.params, case.inputs)
    assert report.ok, render_text(report)
    n = report.evaluations
    line = paired(lambda: timed(lambda: probe(case.forward, case.backward, case.params, case.inputs)),
                  lambda: timed(lambda: bare_loop(case.forward, case.params, case.inputs, n)),
                  repeats)
    print(f"{label:8s} forward {per_call * 1e6:8.1f} us  evaluations {n:6d}  {line}")


def other_work() -> None:
    """Fragment the heap and run unrelated checks, as a long test session would."""
    keep = [np.ones(int(n)) for n in np.random.default_rng(0).integers(1_000, 400_000, 200)]
    del keep[::2]
    for width in (3, 5, 7):
        w = np.linspace(-1, 1, width)
        probe(lambda p, i: float(np.sum(np.sin(p["w"]))), lambda p, i: {"w": np.cos(p["w"])}, {"w": w})


def end_to_end(label: str, repeats: int) -> None:
    """Fresh processes. gradprobe's modules are byte-compiled first, as ``pip install`` does
    (with PYTHONDONTWRITEBYTECODE set, a source checkout would otherwise compile every module
    on every start)."""
    import compileall

    compileall.compile_dir(str(HERE.parent / "gradprobe"), quiet=1)  # the tree the processes import
    case = make_case(*SIZES[label])
    n = probe(case.forward, case.backward, case.params, case.inputs).evaluations
    ours = [sys.executable, "-m", "gradprobe", "check", f"bench/overhead_cases.py:{label}", "-q"]
    bare = [sys.executable, "bench/overhead_cases.py", label, str(n)]
    print(f"{label:8s} end to end, {n} evaluations: {paired(lambda: timed_child(ours), lambda: timed_child(bare), repeats)}")


if __name__ == "__main__":
    print("1. in process, fresh")
    in_process("heavier", repeats=7)
    in_process("cheap", repeats=9)
    print("2. in process, after other work")
    other_work()
    in_process("heavier", repeats=7)
    in_process("cheap", repeats=9)
    print("3. end to end (fresh processes; the bare loop keeps glibc's default heap settings)")
    end_to_end("cheap", repeats=9)
    end_to_end("heavier", repeats=7)
