"""Peak memory a check adds over the caller's own arrays, for numpy and torch targets.

Run by hand: ``OMP_NUM_THREADS=1 python bench/memory_frameworks.py [--allocators]
[--repeats N] [--only torch]``. Each case
runs in a fresh process that imports gradprobe and the framework, builds the target, calls its
forward and backward once (what the user's own code does), collects garbage and returns freed
heap to the system (``malloc_trim``), then resets the kernel's peak resident set size
(``/proc/self/clear_refs``, value 5) and reads the resident size; after the work it reads the
peak (``VmHWM``). That is done for the first check in the process, for the user's own
forward and backward once, then for the check again. The figure is (check's peak - forward
and backward's peak) / the params' bytes: what the check adds over running the target once,
after other work in the same process; goal <= 3. The first check's figure (its lazy imports
and first-use caches included) is printed beside it. Imports and the caller's arrays are in
the "before", never in the figure, and the heap freed earlier is not there to hide arrays.

``--allocators``: the same cases, each in another fresh process, with the peak of numpy's
buffers and Python's objects (tracemalloc, which sees numpy's data) during one check, and of
torch's CPU allocator (the profiler's memory events, "Total Allocated") during another, each
over what was live before it (the user's forward temporaries are in both; numpy's count also
the check's own objects). The two peaks need not fall at the same moment: their sum bounds
what the check holds.

Cases (``MEMORY_PARAMS`` parameters, default 4M): the float32 torch network of
bench/torch_targets.py with a hand-written backward and checked through autograd (a
Function's backward), the same in float64, the same network in JAX (a ``custom_vjp`` rule,
reverse mode) and in array-api-strict (a hand-written backward), float32 and float64
(bench/array_targets.py), and bench/scale_targets.py's numpy tanh network (1M).
Checks run with ``--sample 0`` (directional checks) and with default options.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

CASES = {
    "torch float32, backward": "bench/torch_targets.py:backward_4m",
    "torch float32, autograd": "bench/torch_targets.py:autograd_4m",
    "torch float64, backward": "bench/torch_targets.py:backward64_4m",
    "jax float32, custom_vjp": "bench/array_targets.py:jax32_4m",
    "jax float64, custom_vjp": "bench/array_targets.py:jax64_4m",
    "array-api-strict float32": "bench/array_targets.py:strict32_4m",
    "array-api-strict float64": "bench/array_targets.py:strict64_4m",
    "numpy float64, backward": "bench/scale_targets.py:tanh_1m",
}

RUN = r"""
import ctypes, gc, json, sys
import numpy as np
from gradprobe.targets.loading import load_target
from gradprobe.common.tensors import flatten
from gradprobe.settings.options import CheckOptions
from gradprobe.engine.runner import run_check
spec, sample0, allocators = sys.argv[1], sys.argv[2] == "1", sys.argv[3] == "1"
target = load_target(spec)
leaves = list(flatten(target.params).values())
nbytes = sum(v.nbytes if hasattr(v, "nbytes") else np.from_dlpack(v).nbytes for v in leaves)

def users_own():
    if target.backward is not None:
        target.forward(target.params, target.inputs)
        target.backward(target.params, target.inputs)
        return
    if "jax" in sys.modules:  # a JAX target's reverse mode, as the user would take it
        import jax
        with jax.enable_x64(leaves[0].dtype.itemsize == 8):
            jax.block_until_ready(jax.grad(target.forward, argnums=(0, 1))(target.params, target.inputs))
        return
    import torch  # a torch target's reverse mode, as the user would take it
    wrt = [t for t in [*leaves, *flatten(target.inputs).values()] if t.is_floating_point()]
    for t in wrt:
        t.requires_grad_(True)
    torch.autograd.grad(target.forward(target.params, target.inputs), wrt)
    for t in wrt:
        t.requires_grad_(False)

users_own()
options = CheckOptions(sample=0) if sample0 else CheckOptions()

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024

out = {"params": nbytes}
def peak(work):
    gc.collect()
    ctypes.CDLL(None).malloc_trim(0)
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    before = status("VmRSS")
    done = work()
    return status("VmHWM") - before, done

if not allocators:
    # The first check in the process (its lazy imports and first-use caches included), then
    # the same check again after that work, against the user's own forward and backward.
    first, _ = peak(lambda: run_check(target, options))
    user, _ = peak(users_own)
    check, report = peak(lambda: run_check(target, options))
    out.update(added=check - user, first=first - user, check=check, user=user, ok=report.ok,
               evaluations=report.evaluations)
else:
    run_check(target, options)  # first use: imports, caches and thread pools are not the figure
    gc.collect()
    import tracemalloc
    tracemalloc.start()
    start = tracemalloc.get_traced_memory()[0]
    report = run_check(target, options)
    out["numpy"] = tracemalloc.get_traced_memory()[1] - start
    tracemalloc.stop()
    if "torch" in sys.modules:  # another check: the profiler's own objects are not numpy's
        from torch.profiler import ProfilerActivity, profile
        with profile(activities=[ProfilerActivity.CPU], profile_memory=True) as profiler:
            run_check(target, options)
        path = sys.argv[4]
        profiler.export_chrome_trace(path)
        events = [e["args"] for e in json.load(open(path))["traceEvents"] if e.get("name") == "[memory]"]
        if events:
            base = events[0]["Total Allocated"] - events[0]["Bytes"]
            out["torch"] = max(e["Total Allocated"] for e in events) - base
    out.update(ok=report.ok, evaluations=report.evaluations)
print(json.dumps(out))
"""


def run(spec: str, sample0: bool, allocators: bool) -> dict:
    env = {**os.environ, "PYTHONPATH": f"{ROOT}{os.pathsep}{os.environ.get('PYTHONPATH', '')}"}
    env.setdefault("MEMORY_PARAMS", "1000000" if "scale_targets" in spec else "4000000")
    trace = Path("/tmp") / f"gradprobe-memory-{os.getpid()}.json"
    done = subprocess.run([sys.executable, "-c", RUN, spec, "1" if sample0 else "0",
                           "1" if allocators else "0", str(trace)],
                          capture_output=True, text=True, cwd=ROOT, env=env)
    trace.unlink(missing_ok=True)
    lines = [x for x in done.stdout.splitlines() if x.startswith("{")]
    if not lines:
        raise SystemExit(f"{spec}: {done.stderr[-2000:]}")
    return json.loads(lines[-1])


def main() -> None:
    args = sys.argv[1:]
    allocators = "--allocators" in args
    repeats = int(args[args.index("--repeats") + 1]) if "--repeats" in args else 1
    only = args[args.index("--only") + 1] if "--only" in args else ""
    for sample0 in (True, False):
        for name, spec in CASES.items():
            if only not in name:
                continue
            found = sorted((run(spec, sample0, allocators) for _ in range(repeats)),
                           key=lambda r: r.get("added", 0))
            r = found[len(found) // 2]
            p = r["params"]
            how = "--sample 0" if sample0 else "defaults"
            if allocators:
                torch_part = f", torch allocator {r['torch'] / p:5.2f}x" if "torch" in r else ""
                print(f"{name:24s} {how:10s} numpy buffers {r['numpy'] / p:5.2f}x{torch_part} the "
                      f"params' {p / 1e6:.1f} MB (ok={r['ok']}, {r['evaluations']} evaluations)")
            else:
                spread = ", ".join(f"{x['added'] / p:.2f}" for x in found)
                firsts = ", ".join(f"{x['first'] / p:.2f}" for x in found)
                print(f"{name:24s} {how:10s} peak RSS added {r['added'] / p:5.2f}x the params' "
                      f"{p / 1e6:.1f} MB (runs: {spread}; first check in the process: {firsts}; "
                      f"goal <= 3) = check {r['check'] / p:.2f}x - "
                      f"forward and backward {r['user'] / p:.2f}x; ok={r['ok']}, "
                      f"{r['evaluations']} evaluations")


if __name__ == "__main__":
    main()
