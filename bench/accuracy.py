"""Worst reported relative error and evaluations per coordinate on correct smooth float64 code.

Run by hand: ``python bench/accuracy.py``. The targets are correct by construction (their
backward is the chain rule written out); the figures are what gradprobe reports on them with
the default central method and with ``method="richardson"``.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from scale_targets import Network

from gradprobe import probe


def tanh_net(batch, seed, mean=True):
    net = Network([6, 16, 8, 3], batch, seed=seed)
    params, inputs = net.setup()
    if not mean:  # a sum over the batch instead of a mean
        return (lambda p, i: net.forward(p, i) * batch,
                lambda p, i: {k: {n: g * batch for n, g in v.items()} for k, v in net.backward(p, i).items()},
                params, inputs)
    return net.forward, net.backward, params, inputs


def shop_demand(scale):
    """A log-linear demand model over 200 shops: mean Poisson deviance (smooth)."""
    rng = np.random.default_rng(3)
    x = rng.normal(size=(200, 5))
    y = rng.poisson(3.0, size=200).astype(float)
    params = {"beta": rng.normal(scale=0.2 * scale, size=5), "c": np.array(0.5 * scale)}

    def forward(p, i):
        eta = i["x"] @ p["beta"] / scale + p["c"] / scale
        return float(np.mean(np.exp(eta) - i["y"] * eta))

    def backward(p, i):
        eta = i["x"] @ p["beta"] / scale + p["c"] / scale
        r = (np.exp(eta) - i["y"]) / i["y"].size / scale
        return {"beta": i["x"].T @ r, "c": np.array(r.sum())}

    return forward, backward, params, {"x": x, "y": y}


CASES = {
    "tanh net, mean over 32": tanh_net(32, 0),
    "tanh net, mean over 2000": tanh_net(2000, 1),
    "tanh net, sum over 256": tanh_net(256, 2, mean=False),
    "shop demand, params ~1": shop_demand(1.0),
    "shop demand, params ~1e-3": shop_demand(1e-3),
    "shop demand, params ~1e3": shop_demand(1e3),
}


def main() -> None:
    for method in ("central", "richardson"):
        worst = 0.0
        print(f"method {method}")
        for name, (fwd, bwd, params, inputs) in CASES.items():
            t0, c0 = time.perf_counter(), time.process_time()
            report = probe(fwd, bwd, params, inputs, method=method)
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            err = max(t.max_rel_error or 0.0 for t in report.tensors)
            worst = max(worst, err)
            per = report.evaluations / max(report.checked, 1)
            print(f"  {name:28s} ok={report.ok!s:5s} worst={err:.1e} "
                  f"evaluations/coordinate={per:.2f} wall={wall:.2f}s cpu={cpu:.2f}s")
        print(f"  worst over all: {worst:.1e}")


if __name__ == "__main__":
    main()
