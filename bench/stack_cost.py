"""Cost of checking a network as a stack against checking it as one flat target.

Run by hand: ``python bench/stack_cost.py``. The network is the shop demand stack of
``samples/shop_demand_stack.py`` (and a wider copy of it). The flat check is the same network
with forward and backward composed into one target, exactly what the stack check runs end to
end; the stack check adds every layer's backward checked on its own. Prints forward
evaluations (each own-check evaluation calls one layer, not the network), then wall and CPU
time of the two checks, alternated and repeated, as median ratios.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "samples"))

from shop_demand_stack import layers, setup

from gradprobe.engine.runner import run_check
from gradprobe.targets.stack import end_to_end, stack
from gradprobe.engine.stack_run import run_stack

REPEATS = 7


def widened(scale: int):
    """The sample's arrays with ``scale`` times as many shops (the batch)."""
    params, inputs = setup()
    rng = np.random.default_rng(scale)
    inputs = {k: np.concatenate([v] + [v + rng.normal(scale=0.1, size=v.shape) for _ in range(scale - 1)])
              for k, v in inputs.items()}
    return params, inputs


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    report = fn()
    return report, time.perf_counter() - wall, time.process_time() - cpu


def measure(label: str, params, inputs) -> None:
    st = stack(layers, params, inputs, label)
    flat = end_to_end(st)
    ratios_wall, ratios_cpu = [], []
    for k in range(REPEATS):
        order = [("flat", lambda: run_check(flat)), ("stack", lambda: run_stack(st))]
        if k % 2:
            order.reverse()
        seconds = {name: timed(fn) for name, fn in order}
        ratios_wall.append(seconds["stack"][1] / seconds["flat"][1])
        ratios_cpu.append(seconds["stack"][2] / seconds["flat"][2])
    flat_report, stack_report = seconds["flat"][0], seconds["stack"][0]
    own = {layer.name: layer.own_evaluations for layer in stack_report.layers if layer.own}
    end = stack_report.evaluations - stack_report.own_evaluations
    print(f"{label}: {sum(t.size for t in flat_report.tensors)} coordinates end to end")
    print(f"  flat check:  {flat_report.evaluations} evaluations of the whole network")
    print(f"  stack check: {end} of the whole network + {stack_report.own_evaluations} of single "
          f"layers ({', '.join(f'{n} {c}' for n, c in own.items())}) = {stack_report.evaluations}")
    print(f"  evaluations ratio {stack_report.evaluations / flat_report.evaluations:.2f}; "
          f"time ratio (median of {REPEATS}, alternated) wall {statistics.median(ratios_wall):.2f}, "
          f"CPU {statistics.median(ratios_cpu):.2f}")


def main() -> None:
    measure("shop demand stack, 10 shops", *setup())
    measure("shop demand stack, 200 shops", *widened(20))


if __name__ == "__main__":
    main()
