"""Checks at scale: directional checks and localisation, sampling, worker processes.

Run by hand: ``python bench/scale.py``. Prints, with evaluation counts and ratios:
1. a three-layer network of ~200k parameters with one wrong weight element, --sample 0;
2. a correct network of ~1M parameters with the default plan (per tensor: the directions'
   calls and the coordinates'), and the most for one tensor at seeds 0-7;
3. a forward of ~20 ms checked serially and with --jobs 2, alternating, with the CPU time of
   the parent and of the workers (goal: speedup >= 1.7 on an idle 2-core machine);
4. the cost of sending and applying one whole-tensor perturbation, as a slice and as an
   explicit index array.
"""

from __future__ import annotations

import os
import resource
import time
from pathlib import Path

from gradprobe import probe_target
from gradprobe.render.json import report_dict
from gradprobe.targets.loading import load_target

HERE = Path(__file__).resolve().parent
TARGETS = HERE / "scale_targets.py"


def _spec(name: str) -> str:
    return f"{TARGETS}:{name}"


def _params(report):
    return sum(t.size for t in report.tensors)


def one_wrong() -> None:
    start = time.perf_counter()
    report = probe_target(_spec("one_wrong_200k"), sample=0)
    seconds = time.perf_counter() - start
    print(f"1. one wrong element, {_params(report):,} parameters, --sample 0")
    for t in report.tensors:
        print(f"   {t.name:10s} {t.status:5s} bad {list(t.bad_indices)} evaluations {t.evaluations}"
              + (f" (localisation {t.located_evaluations})" if t.located_evaluations else ""))
    others_pass = all(t.status == "pass" for t in report.tensors if t.name != "layer2.W")
    found = report.tensor("layer2.W").bad_indices == ((17, 42),)
    print(f"   found (17, 42): {found}; every other tensor passes: {others_pass}; "
          f"forward evaluations {report.evaluations} (goal <= 200; a full sweep: "
          f"{2 * _params(report):,}); {seconds:.1f} s")


def correct_large(seeds: int = 8) -> None:
    start = time.perf_counter()
    report = probe_target(_spec("correct_1m"))
    seconds = time.perf_counter() - start
    print(f"2. correct network, {_params(report):,} parameters, default plan")
    for t in report.tensors:
        along = sum(d.evaluations for d in t.directions)
        print(f"   {t.name:10s} {t.status:5s} checked {t.checked}/{t.size} + {len(t.directions)} "
              f"directions, evaluations {t.evaluations} (directions {along}, coordinates "
              f"{t.evaluations - along})")
    worst = max(t.evaluations for t in report.tensors)
    print(f"   ok: {report.ok}; most evaluations for one tensor {worst} (goal <= 100); "
          f"{report.evaluations} in all; {seconds:.1f} s")
    # Which coordinates the sample holds decides how many need more than their first pair
    # (those whose rounding noise hides the threshold at the first step), so the figure
    # moves with the seed.
    most, statuses = [], set()
    for seed in range(seeds):
        again = probe_target(_spec("correct_1m"), seed=seed)
        most.append(max(t.evaluations for t in again.tensors))
        statuses.update(str(t.status) for t in again.tensors)
    print(f"   most for one tensor at seeds 0-{seeds - 1}: {most} (median {sorted(most)[seeds // 2]}); "
          f"statuses seen: {sorted(statuses)}")


def parallel(pairs: int = 3) -> None:
    """--jobs 2 against serial on a ~20 ms forward, alternating; wall and parent CPU time."""
    target = load_target(_spec("heavy_20ms"))
    params, inputs = target.params, target.inputs
    start = time.perf_counter()
    for _ in range(5):
        target.forward(params, inputs)
    per_call = (time.perf_counter() - start) / 5
    walls: dict[int, list[float]] = {1: [], 2: []}
    cpus: dict[int, list[float]] = {1: [], 2: []}
    workers_cpu: list[float] = []
    reports = {}
    for k in range(pairs):
        for jobs in ((1, 2) if k % 2 == 0 else (2, 1)):
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            wall, cpu = time.perf_counter(), time.process_time()
            reports[jobs] = probe_target(_spec("heavy_20ms"), jobs=jobs)
            walls[jobs].append(time.perf_counter() - wall)
            cpus[jobs].append(time.process_time() - cpu)
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
            if jobs == 2:
                workers_cpu.append(after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime)
    speedups = sorted(a / b for a, b in zip(walls[1], walls[2]))
    same = report_dict(reports[1])["layers"] == report_dict(reports[2])["layers"]
    print(f"3. forward {per_call * 1e3:.1f} ms, {reports[1].evaluations} evaluations, "
          f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}: serial "
          f"{min(walls[1]):.2f} s wall / {min(cpus[1]):.2f} s CPU, --jobs 2 {min(walls[2]):.2f} s "
          f"wall / {min(cpus[2]):.2f} s CPU in the parent + {min(workers_cpu):.2f} s in the "
          f"workers; median speedup "
          f"{speedups[len(speedups) // 2]:.2f} over {pairs} alternating pairs (goal >= 1.7 on an "
          f"idle machine); same report: {same}")


def transport(size: int = 750_000) -> None:
    """One whole-tensor perturbation of ``size`` float64 values: bytes sent to a worker and
    the time to apply and undo it, as a slice and as an explicit int64 index."""
    import pickle

    import numpy as np

    from gradprobe.engine.evaluate import LossFunction, Perturbation
    from gradprobe.common.tensors import Workspace

    values = np.random.default_rng(0).normal(size=size)
    loss = LossFunction(lambda p, i: 0.0, Workspace({"w": values}, {}), None)
    as_slice = Perturbation("w", slice(0, size), values + 1e-6)
    as_index = Perturbation("w", np.arange(size)[::-1].copy(), (values + 1e-6)[::-1].copy())
    line = []
    for label, p in (("slice", as_slice), ("int64 index", as_index)):
        start = time.perf_counter()
        for _ in range(20):
            loss.at(p)
        per = (time.perf_counter() - start) / 20
        line.append(f"{label}: {len(pickle.dumps(p)) / 1e6:.1f} MB pickled, {per * 1e3:.2f} ms "
                    "to apply and undo")
    print(f"4. a whole-tensor perturbation of {size} values: " + "; ".join(line))


if __name__ == "__main__":
    one_wrong()
    correct_large()
    parallel()
    transport()
