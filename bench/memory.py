"""Peak memory a check adds, as a user's machine sees it.

Run by hand: ``python bench/memory.py [PARAMS] [--kinked]``. Two fresh processes, alternating,
three times:

- the check: ``python -m gradprobe check bench/scale_targets.py:tanh_1m --sample 0 -q``
  (directional checks only);
- the baseline: a process that imports the same modules the check ran with (read off a first
  check run) and runs the target's setup, forward and backward once.

Each peak resident set size is read by a wrapper process whose only child is the measured
one (``RUSAGE_CHILDREN``). The figure is (check peak - baseline peak) divided by the params'
bytes; the goal is at most 3. ``--kinked``: a ReLU network of the same size whose first layer
starts at zero for a quarter of its units (coinciding kinks), so the check also takes its
second look off the kinks, at moved copies of the target. ``--warm``: both processes first
run two other checks (a buggy sample and a 200k network with a wrong element), so the figure is
what the check adds after other work in the same process. ``--sampled``: the check samples
coordinates beside its directions (no ``--sample 0``); on the kinked network some sampled
coordinates sit on kinks, so the second look runs.

Peaks of two processes compare well only when the check's arrays, not an import, make the
peak: a framework's import (torch's is ~700 MB) can peak above the arrays a check adds and
hide them. ``bench/memory_frameworks.py`` measures framework targets, and numpy ones, within
one process instead (peak minus the resident size before, the kernel's peak reset first).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

WRAPPER = r"""
import json, resource, subprocess, sys, time
t0 = time.perf_counter()
code = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL).returncode
usage = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"peak": usage.ru_maxrss * 1024, "code": code, "wall": time.perf_counter() - t0,
                  "cpu": usage.ru_utime + usage.ru_stime}))
"""

MODULES = r"""
import atexit, runpy, sys
atexit.register(lambda: open({out!r}, "w").write("\n".join(sorted(sys.modules))))
sys.argv = ["gradprobe", *{args!r}]
runpy.run_module("gradprobe", run_name="__main__", alter_sys=True)
"""

WARM = r"""
import runpy, sys
def check(*args):
    saved = sys.argv
    sys.argv = ["gradprobe", "check", *args]
    try:
        runpy.run_module("gradprobe", run_name="__main__", alter_sys=True)
    except SystemExit:
        pass
    finally:
        sys.argv = saved
check("samples/crop_yield_buggy.py", "-q")
check("bench/scale_targets.py:one_wrong_200k", "-q")
"""

CHECK = WARM + r"""
check(*{args!r})
"""

BASELINE = r"""
import importlib
for name in open({modules!r}).read().split():
    try:
        importlib.import_module(name)
    except Exception:
        pass
from gradprobe.targets.loading import load_target
target = load_target({spec!r})
target.forward(target.params, target.inputs)
target.backward(target.params, target.inputs)
nbytes = 0
def walk(tree):
    global nbytes
    for v in tree.values():
        if isinstance(v, dict):
            walk(v)
        else:
            nbytes += v.nbytes
walk(target.params)
open({sizes!r}, "w").write(str(nbytes))
"""


def _env(size: int) -> dict[str, str]:
    path = os.environ.get("PYTHONPATH", "")
    return {**os.environ, "MEMORY_PARAMS": str(size),
            "PYTHONPATH": f"{ROOT}{os.pathsep}{path}" if path else str(ROOT)}


def measured(args: list[str], size: int) -> dict:
    out = subprocess.run([sys.executable, "-c", WRAPPER, *args], capture_output=True, text=True,
                         check=True, cwd=ROOT, env=_env(size))
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    rest = [a for a in sys.argv[1:] if a not in ("--kinked", "--warm", "--sampled")]
    kinked = "--kinked" in sys.argv[1:]
    warm = "--warm" in sys.argv[1:]
    size = int(rest[0]) if rest else 1_000_000
    spec = f"bench/scale_targets.py:{'kinked_1m' if kinked else 'tanh_1m'}"
    sampled = "--sampled" in sys.argv[1:]
    check = ["check", spec, "-q"] if sampled else ["check", spec, "--sample", "0", "-q"]
    scratch = Path(tempfile.mkdtemp())
    modules, sizes = scratch / "modules", scratch / "bytes"
    subprocess.run([sys.executable, "-c", MODULES.format(out=str(modules), args=check)],
                   stdout=subprocess.DEVNULL, cwd=ROOT, env=_env(size))
    baseline = [sys.executable, "-c", (WARM if warm else "")
                + BASELINE.format(modules=str(modules), spec=spec, sizes=str(sizes))]
    ours = ([sys.executable, "-c", CHECK.format(args=check[1:])] if warm
            else [sys.executable, "-m", "gradprobe", *check])
    ratios = []
    for k in range(3):
        if k % 2 == 0:
            base, checked = measured(baseline, size), measured(ours, size)
        else:
            checked, base = measured(ours, size), measured(baseline, size)
        nbytes = int(sizes.read_text())
        added = checked["peak"] - base["peak"]
        ratios.append(added / nbytes)
        print(f"params {nbytes / 1e6:.1f} MB; baseline peak {base['peak'] / 1e6:.0f} MB; check peak "
              f"{checked['peak'] / 1e6:.0f} MB (exit {checked['code']}); added {added / 1e6:.1f} MB = "
              f"{added / nbytes:.2f} x the params; check {checked['wall']:.1f} s wall, "
              f"{checked['cpu']:.1f} s CPU")
    ratios.sort()
    print(f"median added memory{' (kinked ReLU network)' if kinked else ''}"
          f"{' with sampled coordinates' if sampled else ''}"
          f"{' after other checks in the same process' if warm else ''}: "
          f"{ratios[len(ratios) // 2]:.2f} x the parameters' bytes (goal <= 3)")


if __name__ == "__main__":
    main()
