"""The overhead benchmark's targets, and the bare loop they are compared with.

``gradprobe check bench/overhead_cases.py:cheap`` checks a tanh layer scoring shop demand
(about 10 us per forward); ``:heavier`` the same layer on a larger batch (about 1 ms).
``python bench/overhead_cases.py cheap N`` runs the bare loop of N forward calls in a fresh
process, for the end-to-end comparison.
"""

from __future__ import annotations

import sys
import time
from types import SimpleNamespace

import numpy as np

SIZES = {"cheap": (16, 8), "heavier": (6000, 20)}


def make_case(batch: int, width: int) -> SimpleNamespace:
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

    return SimpleNamespace(forward=forward, backward=backward, params={"W": W},
                           inputs={"x": x, "y": y})


cheap = make_case(*SIZES["cheap"])
heavier = make_case(*SIZES["heavier"])


def bare_loop(forward, params, inputs, evaluations: int) -> None:
    """Central differences by hand with ``evaluations`` forward calls."""
    W = params["W"].copy()
    p = {"W": W}
    flat = W.reshape(-1)
    h = 6e-6
    grad = np.empty(flat.size)
    forward(p, inputs)
    calls, i = 1, 0
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


if __name__ == "__main__":
    case = sys.argv[1]
    start = time.perf_counter()
    target = make_case(*SIZES[case])
    bare_loop(target.forward, target.params, target.inputs, int(sys.argv[2]))
