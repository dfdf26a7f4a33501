"""Overhead of a gradprobe full sweep against a bare numpy central-difference loop.

Run by hand: ``python bench/overhead.py``. For a cheap (about 10 us) and a heavier (about
1 ms) forward it times gradprobe's full sweep and a plain loop that makes exactly as many
forward calls (perturb, call, restore), alternating the two, and prints the median ratio.
Goal: at most 1.2 for the heavier forward.
"""

from __future__ import annotations

import time

import numpy as np

from gradprobe import probe, render_text


def make_case(batch: int, width: int):
    """A tanh layer scoring shop demand: loss = sum(tanh(x @ W) * y)."""
    rng = np.random.default_rng(1)
    x = rng.normal(size=(batch, width))
    y = rng.normal(size=(batch, width))
    W = rng.normal(scale=0.3, size=(width, width))

    def forward(p, i):
        return float(np.sum(np.tanh(i["x"] @ p["W"]) * i["y"]))

    def backward(p, i):
        t = np.tanh(i["x"] @ p["W"])
        return {"W": i["x"].T @ ((1 - t**2) * i["y"])}

    return forward, backward, {"W": W}, {"x": x, "y": y}


def bare_loop(forward, params, inputs, evaluations: int) -> float:
    """Central differences by hand with the same number of forward calls; returns seconds."""
    W = params["W"].copy()
    p = {"W": W}
    flat = W.reshape(-1)
    h = 6e-6
    start = time.perf_counter()
    calls = 0
    grad = np.empty(flat.size)
    forward(p, inputs)
    calls += 1
    i = 0
    while calls + 2 <= evaluations:
        k = i % flat.size
        old = flat[k]
        flat[k] = old + h
        fp = forward(p, inputs)
        flat[k] = old - h
        fm = forward(p, inputs)
        flat[k] = old
        grad[k] = (fp - fm) / (2 * h)
        calls += 2
        i += 1
    while calls < evaluations:
        forward(p, inputs)
        calls += 1
    return time.perf_counter() - start


def paired(first, second, repeats: int) -> tuple[float, float, float]:
    """Alternate the two timings ``repeats`` times (so drift hits both alike); returns the
    best time of each and the median of the per-pair ratios."""
    times_a, times_b = [], []
    for _ in range(repeats):
        times_a.append(first())
        times_b.append(second())
    ratios = sorted(a / b for a, b in zip(times_a, times_b))
    return min(times_a), min(times_b), ratios[len(ratios) // 2]


def measure(label: str, batch: int, width: int, repeats: int) -> None:
    forward, backward, params, inputs = make_case(batch, width)
    t0 = time.perf_counter()
    for _ in range(50):
        forward(params, inputs)
    per_call = (time.perf_counter() - t0) / 50
    report = probe(forward, backward, params, inputs)
    assert report.ok, render_text(report)
    n = report.evaluations

    def probe() -> float:
        start = time.perf_counter()
        probe(forward, backward, params, inputs)
        return time.perf_counter() - start

    ours, bare, ratio = paired(probe, lambda: bare_loop(forward, params, inputs, n), repeats)
    print(
        f"{label:8s} forward {per_call * 1e6:8.1f} us  coordinates {params['W'].size:5d}  "
        f"evaluations {n:6d}  gradprobe {ours:7.3f} s  bare loop {bare:7.3f} s  "
        f"median ratio {ratio:5.2f} over {repeats} alternating pairs"
    )


if __name__ == "__main__":
    measure("cheap", batch=16, width=8, repeats=9)
    measure("heavier", batch=6000, width=20, repeats=7)
