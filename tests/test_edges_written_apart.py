"""Verdicts at the edges on cases written apart from the engine's own tests: a ReLU and a tanh
model with 24,000 to 100,000 elements in one tensor, and an absolute-error loss whose residuals
sit 1e-7 to 1e-2 from their kinks.

References: the closed forms below (chain rule; d tanh = 1 - tanh^2, d max(z, 0) = [z > 0] off
the kink, d|r| = sign(r) off the kink: any table of derivatives) are checked against
mpmath.diff at 40 digits on small instances of the same models before they are trusted.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

ACTS = {
    "tanh": (np.tanh, lambda z: 1 - np.tanh(z) ** 2, mpmath.tanh),
    "relu": (lambda z: np.maximum(z, 0.0), lambda z: (z > 0).astype(float), lambda v: v if v > 0 else mpmath.mpf(0)),
}


class Readings:
    """Hourly river readings x (n, d) through one wide layer W (d, h), bias b, fixed read-out v;
    loss 0.5 * sum((act(x W + b) v - y)^2)."""

    def __init__(self, d, h, act, seed, n=6):
        rng = np.random.default_rng(seed)
        self.act = act
        self.params = {"layer": {"W": rng.normal(size=(d, h)) / np.sqrt(d), "b": rng.normal(size=h) * 0.1}}
        self.inputs = {"x": rng.normal(size=(n, d)), "v": rng.normal(size=h) / np.sqrt(h), "y": rng.normal(size=n)}
        self.slip = None

    def forward(self, p, i):
        z = i["x"] @ p["layer"]["W"] + p["layer"]["b"]
        r = ACTS[self.act][0](z) @ i["v"] - i["y"]
        return 0.5 * float(r @ r)

    def backward(self, p, i):
        z = i["x"] @ p["layer"]["W"] + p["layer"]["b"]
        a = ACTS[self.act][0](z)
        r = a @ i["v"] - i["y"]
        gz = np.outer(r, i["v"]) * ACTS[self.act][1](z)
        gW = i["x"].T @ gz
        if self.slip is not None:
            k, factor = self.slip
            gW.reshape(-1)[k] *= factor
        return {"layer": {"W": gW, "b": gz.sum(axis=0)}}

    def mp_derivative(self, name, index):
        """mpmath.diff of the same loss along one coordinate (small instances only)."""
        P = {k: v.copy() for k, v in self.params["layer"].items()}
        x, v, y = self.inputs["x"], self.inputs["v"], self.inputs["y"]

        def loss(t):
            W = [[mpmath.mpf(float(e)) for e in row] for row in P["W"]]
            b = [mpmath.mpf(float(e)) for e in P["b"]]
            (W[index[0]].__setitem__(index[1], t) if name == "W" else b.__setitem__(index[0], t))
            total = mpmath.mpf(0)
            for s in range(x.shape[0]):
                out = sum(ACTS[self.act][2](sum(mpmath.mpf(float(x[s, i])) * W[i][j] for i in range(x.shape[1])) + b[j])
                          * mpmath.mpf(float(v[j])) for j in range(len(b)))
                total += (out - mpmath.mpf(float(y[s]))) ** 2
            return total / 2

        at = P["W"][index] if name == "W" else P["b"][index]
        with mpmath.workdps(40):
            return float(mpmath.diff(loss, mpmath.mpf(float(at))))


@pytest.mark.parametrize("act", ["tanh", "relu"])
def test_the_wide_layer_closed_form_agrees_with_mpmath(act):
    m = Readings(4, 3, act, seed=11)
    g = m.backward(m.params, m.inputs)["layer"]
    for name, index in [("W", (0, 0)), ("W", (3, 2)), ("W", (1, 1)), ("b", (2,))]:
        assert g[name][index] == pytest.approx(m.mp_derivative(name, index), rel=1e-12, abs=1e-14)


@pytest.mark.parametrize("d, h, act, seed, factor", [
    (400, 250, "tanh", 3, 0.99),   # 100,000 elements, one 1% low
    (400, 250, "tanh", 8, 1.01),
    (200, 120, "relu", 1, 1.01),   # 24,000 elements behind ReLU kinks
    (200, 120, "relu", 5, 0.99),
])
def test_one_element_one_percent_off_in_a_wide_tensor_fails_and_is_located(d, h, act, seed, factor):
    m = Readings(d, h, act, seed)
    truth = m.backward(m.params, m.inputs)["layer"]["W"]
    k = int(np.argsort(np.abs(truth).reshape(-1))[d * h // 2])  # an element of typical size
    m.slip = (k, factor)
    t = probe(m.forward, m.backward, m.params, m.inputs, seed=seed).tensor("layer.W")
    assert t.status.value == "fail", (t.status, t.inconclusive_reason)
    assert tuple(np.unravel_index(k, (d, h))) in {tuple(i) for i in t.bad_indices}


@pytest.mark.parametrize("act, seed", [("relu", 2), ("relu", 7), ("tanh", 4)])
def test_a_correct_wide_model_is_never_inconclusive(act, seed):
    m = Readings(200, 120, act, seed)
    report = probe(m.forward, m.backward, m.params, m.inputs, seed=seed)
    assert {t.name: t.status.value for t in report.tensors} in (
        {"layer.W": a, "layer.b": b} for a in ("pass", "kink") for b in ("pass", "kink"))


class Gauge:
    """Absolute error of a tanh read-out of gauge levels, with ``hits`` residuals placed ``d``
    from their kinks (along the intercept c; along other coordinates at d over their slope)."""

    def __init__(self, d, hits, seed, slip=None):
        rng = np.random.default_rng(seed)
        self.params = {"W": rng.normal(size=(4, 5)) / 2, "w": rng.normal(size=5) / 2, "c": np.array(0.3)}
        x = rng.normal(size=(10, 4))
        y = self._pred(self.params, x) + rng.normal(size=10)
        y[:hits] = self._pred(self.params, x)[:hits] - d * np.arange(1, hits + 1)
        self.inputs = {"x": x, "y": y}
        self.slip = slip

    @staticmethod
    def _pred(p, x):
        return np.tanh(x @ p["W"]) @ p["w"] + p["c"]

    def forward(self, p, i):
        return float(np.sum(np.abs(self._pred(p, i["x"]) - i["y"])))

    def backward(self, p, i):
        a = np.tanh(i["x"] @ p["W"])
        s = np.sign(self._pred(p, i["x"]) - i["y"])
        g = {"W": i["x"].T @ (np.outer(s, p["w"]) * (1 - a * a)), "w": a.T @ s, "c": np.array(s.sum())}
        if self.slip:
            g["W"] = g["W"].copy()
            g["W"][1, 2] *= 1.01
        return g

    def mp_intercept_derivative(self):
        x, y, p = self.inputs["x"], self.inputs["y"], self.params
        base = [sum(mpmath.tanh(sum(mpmath.mpf(float(x[s, i])) * mpmath.mpf(float(p["W"][i, j])) for i in range(4)))
                    * mpmath.mpf(float(p["w"][j])) for j in range(5)) - mpmath.mpf(float(y[s])) for s in range(10)]
        with mpmath.workdps(40):  # a step far below the smallest distance to a kink
            return float(mpmath.diff(lambda t: sum(abs(r + t) for r in base), mpmath.mpf(0.3), h=mpmath.mpf("1e-25")))


@pytest.mark.parametrize("d", [1e-7, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2])
def test_kinks_at_any_distance_from_the_point_raise_no_false_alarm(d):
    g = Gauge(d, hits=3, seed=5)
    assert g.backward(g.params, g.inputs)["c"] == pytest.approx(g.mp_intercept_derivative(), abs=1e-12)
    report = probe(g.forward, g.backward, g.params, g.inputs)
    assert report.ok and all(t.status.value != "fail" for t in report.tensors)
    # the same loss with one weight's gradient 1% off fails there
    bad = Gauge(d, hits=3, seed=5, slip=True)
    t = probe(bad.forward, bad.backward, bad.params, bad.inputs).tensor("W")
    assert t.status.value == "fail" and (1, 2) in {tuple(i) for i in t.bad_indices}
