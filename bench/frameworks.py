"""Cost of the array boundary on a CPU torch target.

Run by hand: ``python bench/frameworks.py``. Per forward evaluation, four loops making the
same single-coordinate perturbations (set, call, restore) of a small torch target (a cheap
forward, so that overhead shows):

- bare torch: the perturbation written into the tensor, forward called on it;
- gradprobe torch: the engine's evaluator (numpy copies, the boundary converting each call);
- bare numpy and gradprobe numpy: the same forward written with numpy.

Goal: the boundary adds at most 20 us per evaluation over the numpy path, i.e.
(gradprobe torch - bare torch) - (gradprobe numpy - bare numpy) <= 20 us. Each pair is
alternated and repeated; medians of wall and CPU time are printed, with the ratio against the
bare torch loop. Then memory: the peak of numpy's buffers and Python's objects (tracemalloc)
during a whole check of a target with a 1 MB param, against the param's bytes, the same target
as numpy arrays and as torch tensors: what the boundary adds is the difference. tracemalloc
does not see torch's own allocator (the user's forward and backward allocate there; the
tensors the boundary hands over share numpy's memory), and it counts the check's fixed costs
(report, caches) and the user's forward temporaries, which dominate at 1 MB: the resident
memory a check adds to a large target, for torch's allocator too, is
``bench/memory_frameworks.py``'s.
"""

from __future__ import annotations

import statistics
import time
import tracemalloc

import numpy as np
import torch

from gradprobe import probe
from gradprobe.targets.boundary import describe
from gradprobe.targets.frameworks import Framed
from gradprobe.engine.evaluate import LossFunction, Perturbation
from gradprobe.engine.evaluator import Evaluator
from gradprobe.common.tensors import Workspace

CALLS = 400


def torch_forward(p, i):
    return torch.sum(torch.tanh(i["x"] @ p["w"]) ** 2)


def numpy_forward(p, i):
    return float(np.sum(np.tanh(i["x"] @ p["w"]) ** 2))


def case():
    rng = np.random.default_rng(0)
    w, x = rng.normal(size=(16, 8)), rng.normal(size=(4, 16))
    return w, x


def bare(forward, params, inputs, flat_w, h):
    """Perturb, call, restore, CALLS times (coordinate k % size)."""
    for k in range(CALLS):
        j = k % flat_w.shape[0]
        old = flat_w[j].item() if hasattr(flat_w[j], "item") else flat_w[j]
        flat_w[j] = old + h
        float(forward(params, inputs))
        flat_w[j] = old


def engine(forward, params, inputs, h):
    ws = Workspace(params, inputs)
    ev = Evaluator(LossFunction(forward, ws, None))
    size = ws.owners["w"].size
    base = ws.owners["w"].reshape(-1)
    moves = [Perturbation("w", np.array([k % size]), np.array([base[k % size] + h]))
             for k in range(CALLS)]
    start = (time.perf_counter(), time.process_time())
    ev.losses(moves)
    return start


def per_call(fn) -> tuple[float, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    fn()
    return (time.perf_counter() - wall) / CALLS * 1e6, (time.process_time() - cpu) / CALLS * 1e6


def main(repeats: int = 9) -> None:
    torch.set_num_threads(1)  # a tiny forward: torch's thread pool only adds scheduling noise
    w, x = case()
    tw, tx = torch.tensor(w), torch.tensor(x)
    boundary = describe({"w": tw}, {"x": tx})
    framed = Framed(torch_forward, boundary, "forward")
    np_params, np_inputs = boundary.numpy_tree({"w": tw}), boundary.numpy_tree({"x": tx})
    runs = {
        "bare torch": lambda: bare(torch_forward, {"w": tw}, {"x": tx}, tw.view(-1), 1e-3),
        "gradprobe torch": lambda: engine(framed, np_params, np_inputs, 1e-3),
        "bare numpy": lambda: bare(numpy_forward, {"w": w}, {"x": x}, w.reshape(-1), 1e-3),
        "gradprobe numpy": lambda: engine(numpy_forward, {"w": w.copy()}, {"x": x}, 1e-3),
    }
    times: dict[str, list[tuple[float, float]]] = {k: [] for k in runs}
    order = list(runs)
    for r in range(repeats):
        for name in (order if r % 2 == 0 else order[::-1]):  # alternate the order
            times[name].append(per_call(runs[name]))
    med = {k: (statistics.median(t[0] for t in v), statistics.median(t[1] for t in v)) for k, v in times.items()}
    for name, (wall, cpu) in med.items():
        print(f"{name:16s} {wall:8.2f} us/eval wall  {cpu:8.2f} us/eval cpu")
    for k, clock in ((0, "wall"), (1, "cpu")):
        torch_over = med["gradprobe torch"][k] - med["bare torch"][k]
        numpy_over = med["gradprobe numpy"][k] - med["bare numpy"][k]
        print(f"{clock}: engine overhead torch {torch_over:.2f} us, numpy {numpy_over:.2f} us; the "
              f"boundary adds {torch_over - numpy_over:.2f} us per evaluation (goal <= 20)")
    print(f"gradprobe torch / bare torch "
          f"= {med['gradprobe torch'][0] / med['bare torch'][0]:.2f} (wall), "
          f"{med['gradprobe torch'][1] / max(med['bare torch'][1], 1e-9):.2f} (cpu); {CALLS} evaluations x {repeats}")
    memory()


def _peak(forward, backward, params, inputs) -> tuple[float, bool]:
    probe(forward, backward, params, inputs, sample=8)  # warm up (imports, caches)
    tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0]
    report = probe(forward, backward, params, inputs, sample=8)
    peak = tracemalloc.get_traced_memory()[1] - base
    tracemalloc.stop()
    return peak, report.ok


def memory() -> None:
    """Peak Python-side allocations of a whole check: the same target as numpy arrays, as
    torch tensors with a backward, and as torch tensors checked through autograd."""
    rng = np.random.default_rng(1)
    w, x = rng.normal(size=(512, 256)), rng.normal(size=(4, 512))  # a 1 MB param

    def np_forward(p, i):
        return float(np.sum(np.tanh(i["x"] @ p["w"]) ** 2))

    def np_backward(p, i):
        t = np.tanh(i["x"] @ p["w"])
        return {"w": i["x"].T @ (2 * t * (1 - t * t))}  # d tanh = 1 - tanh^2

    def backward(p, i):
        t = torch.tanh(i["x"] @ p["w"])
        return {"w": i["x"].T @ (2 * t * (1 - t * t))}

    tw, tx = torch.tensor(w), torch.tensor(x)
    cases = {"numpy": (np_forward, np_backward, {"w": w}, {"x": x}),
             "torch, backward": (torch_forward, backward, {"w": tw}, {"x": tx}),
             "torch, autograd": (torch_forward, None, {"w": tw}, {"x": tx})}
    found = {name: _peak(*args) for name, args in cases.items()}
    for name, (peak, ok) in found.items():
        print(f"memory {name:16s} peak {peak / 1e6:6.2f} MB = {peak / w.nbytes:5.2f}x the param's "
              f"{w.nbytes / 1e6:.2f} MB (ok={ok})")
    print(f"the boundary adds {(found['torch, backward'][0] - found['numpy'][0]) / w.nbytes:+.2f}x "
          f"(backward), {(found['torch, autograd'][0] - found['numpy'][0]) / w.nbytes:+.2f}x (autograd)")


if __name__ == "__main__":
    main()
