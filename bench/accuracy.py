"""Worst reported relative error and evaluations per coordinate on correct smooth float64 code.

Run by hand: ``python bench/accuracy.py``. The targets are correct by construction (their
backward is the chain rule written out); the figures are what gradprobe reports on them with
the default central method and with ``method="richardson"``:

- ``reported``: the largest relative error gradprobe reports (its denominator per coordinate
  is max(|analytic|, |numeric|, 1e-3 of the tensor's rms gradient), so a coordinate whose
  gradient is a thousandth of its neighbours' shows rounding noise magnified a thousandfold);
- ``scaled``: the numeric derivative's error against the exact one (here the closed-form
  backward), relative to the larger of the coordinate's gradient and its tensor's rms
  gradient: the error on gradients of the size the tensor has (:func:`error_figures`);
- ``normwise``: per tensor, the largest error over the largest gradient (the normwise relative
  error in the max norm).
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


def error_figures(report, reference) -> dict[str, tuple[float, float, float]]:
    """Per tensor of ``report``: (scaled, normwise, absolute) error of the numeric derivatives
    against ``reference`` (a nested dict of exact gradients, as backward returns): the largest
    |numeric - exact| / max(|exact|, rms of the tensor's exact gradient), the largest
    |numeric - exact| over the largest |exact|, and the largest |numeric - exact|."""
    out = {}
    for t in report.tensors:
        exact = reference
        for key in t.name.split("."):
            exact = exact[key]
        exact = np.asarray(exact, dtype=np.float64).reshape(-1)
        c = t.coordinates
        err = np.abs(np.asarray(c.numeric) - exact[c.flat])
        rms = float(np.sqrt(np.mean(exact**2)))
        scaled = float(np.max(err / np.maximum(np.abs(exact[c.flat]), rms)))
        out[t.name] = (scaled, float(err.max() / np.abs(exact).max()), float(err.max()))
    return out


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
        worst = [0.0, 0.0, 0.0]
        print(f"method {method}")
        for name, (fwd, bwd, params, inputs) in CASES.items():
            t0, c0 = time.perf_counter(), time.process_time()
            report = probe(fwd, bwd, params, inputs, method=method)
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            err = max(t.max_rel_error or 0.0 for t in report.tensors)
            figures = error_figures(report, bwd(params, inputs)).values()
            scaled = max(f[0] for f in figures)
            normwise = max(f[1] for f in figures)
            worst = [max(w, e) for w, e in zip(worst, (err, scaled, normwise))]
            per = report.evaluations / max(report.checked, 1)
            print(f"  {name:28s} ok={report.ok!s:5s} reported={err:.1e} scaled={scaled:.1e} "
                  f"normwise={normwise:.1e} evaluations/coordinate={per:.2f} wall={wall:.2f}s cpu={cpu:.2f}s")
        print(f"  worst over all: reported {worst[0]:.1e}, scaled {worst[1]:.1e}, normwise {worst[2]:.1e}")


if __name__ == "__main__":
    main()
