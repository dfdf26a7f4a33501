"""Peak memory a check adds over the target's own set-up, forward and backward.

Run by hand: ``python bench/memory.py [PARAMS] [--kinked]``. Each side runs in a fresh process (peak
resident memory cannot be reset within one): the baseline builds the target and calls forward
and backward once; the check runs ``gradprobe.probe`` with the default plan (sampling and
random directions for a large target). The figure is (check peak - baseline peak) divided by
the parameters' bytes; the issue's goal is at most 3. Runs alternate and repeat.

``--kinked``: a ReLU network of the same size whose first layer starts at zero for a quarter
of its units, so their pre-activations are exactly 0 in every row (kinks that coincide): the
check then also takes its second look off the kinks, at two moved copies of the target.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, {bench!r})
import numpy as np
from scale_targets import Network
size = {size}
hidden = max(8, int((size - 10) / 61))  # 50 inputs, hidden units, 10 outputs
if {kinked}:
    sys.path.insert(0, {tests!r})
    from composer.large import mlp
    net = mlp(0, (50, hidden, 10), "relu", batch=64)
    quarter = hidden // 4
    net.params["layer1.W"][:, :quarter] = 0.0
    net.params["layer1.b"][:quarter] = 0.0
    params, inputs = net.params, net.inputs
    nbytes = sum(v.nbytes for v in params.values())
else:
    net = Network([50, hidden, 10], batch=64, seed=0)
    params, inputs = net.setup()
    nbytes = sum(v.nbytes for layer in params.values() for v in layer.values())
net.forward(params, inputs); net.backward(params, inputs)
t0, c0 = time.perf_counter(), time.process_time()
evaluations = 0
if {check}:
    import gradprobe
    report = gradprobe.probe(net.forward, net.backward, params, inputs)
    evaluations = report.evaluations
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps({{"peak": peak, "nbytes": nbytes, "evaluations": evaluations,
                   "wall": time.perf_counter() - t0, "cpu": time.process_time() - c0}}))
"""


def run(size: int, check: bool, kinked: bool) -> dict:
    here = Path(__file__).resolve().parent
    code = CHILD.format(bench=str(here), tests=str(here.parent / "tests"), size=size, check=check,
                        kinked=kinked)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    args = [a for a in sys.argv[1:] if a != "--kinked"]
    kinked = "--kinked" in sys.argv[1:]
    size = int(args[0]) if args else 1_000_000
    ratios = []
    for _ in range(3):
        base = run(size, False, kinked)
        checked = run(size, True, kinked)
        added = checked["peak"] - base["peak"]
        ratios.append(added / base["nbytes"])
        print(f"params {base['nbytes'] / 1e6:.1f} MB; baseline peak {base['peak'] / 1e6:.0f} MB; "
              f"check peak {checked['peak'] / 1e6:.0f} MB; added {added / 1e6:.1f} MB = "
              f"{added / base['nbytes']:.2f} x the params; {checked['evaluations']} evaluations, "
              f"{checked['wall']:.1f} s wall, {checked['cpu']:.1f} s CPU")
    ratios.sort()
    print(f"median added memory{' (kinked ReLU network)' if kinked else ''}: "
          f"{ratios[len(ratios) // 2]:.2f} x the parameters' bytes (goal <= 3)")


if __name__ == "__main__":
    main()
