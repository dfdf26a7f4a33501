"""A check pays for each moved point once.

The steps of a coordinate's re-estimate are probed at 16-fold levels from its first step, and
its ladder starts at one of those levels and comes down to another: the same point asked
again is the same loss value (forward is deterministic, preflight checks it), so a check
reuses it instead of calling forward again. Counted here by the target itself: every point
forward sees, by the bytes of the params it is given. Not timed.
"""

from __future__ import annotations

import collections

import numpy as np

import gradprobe


class CropYield:
    """A small tanh network forecasting crop yields from field measurements (4 plots): a
    mean squared error whose smallest gradients sit below what its first pair's rounding
    resolves, so some coordinates climb a ladder. backward is the closed form
    (d tanh(u)/du = 1 - tanh(u)**2, standard derivative table, with the chain rule)."""

    def __init__(self) -> None:
        rng = np.random.default_rng(3)
        self.params = {"hidden": {"W": rng.normal(size=(10, 48)) / np.sqrt(10), "b": 0.1 * rng.normal(size=48)},
                       "yield": {"W": rng.normal(size=(48, 16)) / np.sqrt(48), "b": 0.1 * rng.normal(size=16)}}
        self.inputs = {"field": rng.normal(size=(4, 10)), "harvest": rng.normal(size=(4, 16))}
        self.points: collections.Counter[bytes] = collections.Counter()

    def forward(self, p, i):
        key = b"".join(np.ascontiguousarray(p[layer][name]).tobytes()
                       for layer in sorted(p) for name in sorted(p[layer]))
        self.points[key] += 1
        h = np.tanh(i["field"] @ p["hidden"]["W"] + p["hidden"]["b"])
        out = h @ p["yield"]["W"] + p["yield"]["b"]
        return float(np.mean((out - i["harvest"]) ** 2))

    @staticmethod
    def backward(p, i):
        h = np.tanh(i["field"] @ p["hidden"]["W"] + p["hidden"]["b"])
        out = h @ p["yield"]["W"] + p["yield"]["b"]
        r = 2.0 * (out - i["harvest"]) / out.size
        dz = (r @ p["yield"]["W"].T) * (1.0 - h**2)
        return {"hidden": {"W": i["field"].T @ dz, "b": dz.sum(axis=0)},
                "yield": {"W": h.T @ r, "b": r.sum(axis=0)}}


def test_no_moved_point_is_evaluated_twice_in_a_check():
    target = CropYield()
    report = gradprobe.probe(target.forward, target.backward, target.params, target.inputs)
    assert report.ok and all(t.status.value == "pass" for t in report.tensors)
    assert sum(target.points.values()) == report.evaluations  # every call is counted
    again = {k: n for k, n in target.points.items() if n > 1}
    # The base point only: preflight evaluates it twice to see that forward is deterministic.
    base = b"".join(np.ascontiguousarray(target.params[layer][name]).tobytes()
                    for layer in sorted(target.params) for name in sorted(target.params[layer]))
    assert set(again) <= {base}, f"{sum(n - 1 for n in again.values())} repeated calls"
    # Re-estimates were needed (else the test shows nothing): more than two calls a coordinate.
    assert report.evaluations > 2 * sum(t.size for t in report.tensors) + 32
