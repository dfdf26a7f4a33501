"""A small network in float32 whose loss is cast with np.float32 (no float64 run is possible),
judged on its own arithmetic: crop yields predicted from five field readings by one hidden
layer (tanh, sigmoid or softplus) and a linear output, fitted by a mean or sum of squared
residuals, both biases initialised to zero.

Reference outside the project: mpmath's high-precision differentiation (mpmath.diff at 50
digits) of the same loss evaluated exactly at the float32 values; each correct backward is
checked against it first, and each planted bug is seen by it to be off by the stated share.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.settings.options import default_threshold

THRESHOLD = default_threshold(np.float32)

ACTIVATIONS = {
    "tanh": (np.tanh, lambda z, h: 1 - h * h, mpmath.tanh),
    "sigmoid": (lambda z: 1 / (1 + np.exp(-z)), lambda z, h: h * (1 - h), lambda z: 1 / (1 + mpmath.exp(-z))),
    "softplus": (lambda z: np.logaddexp(0, z), lambda z, h: 1 / (1 + np.exp(-z)), lambda z: mpmath.log(1 + mpmath.exp(z))),
}


def _yields(seed, activation, width, rows, reduce, bug=None):
    """forward, backward, params, inputs; ``bug`` (tensor, flat index, factor) scales one
    element of backward's gradient."""
    rng = np.random.default_rng(seed)
    readings = rng.normal(size=(rows, 5)).astype(np.float32)
    crop = rng.normal(size=(rows, 1)).astype(np.float32)
    params = {"W1": (0.5 * rng.normal(size=(5, width))).astype(np.float32), "b1": np.zeros(width, np.float32),
              "W2": (0.5 * rng.normal(size=(width, 1))).astype(np.float32), "b2": np.zeros(1, np.float32)}
    act, slope, _ = ACTIVATIONS[activation]

    def forward(p, i):
        r = act(i["x"] @ p["W1"] + p["b1"]) @ p["W2"] + p["b2"] - i["y"]
        return np.float32(np.mean(r * r) if reduce == "mean" else np.sum(r * r))

    def backward(p, i):
        z = i["x"] @ p["W1"] + p["b1"]
        h = act(z)
        d = 2 * (h @ p["W2"] + p["b2"] - i["y"]) / (z.shape[0] if reduce == "mean" else 1)
        dz = (d @ p["W2"].T) * slope(z, h)
        g = {"W1": i["x"].T @ dz, "b1": dz.sum(0), "W2": h.T @ d, "b2": d.sum(0)}
        if bug is not None:
            name, k, factor = bug
            g[name] = g[name].copy()
            g[name].reshape(-1)[k] *= factor
        return g

    return forward, backward, params, {"x": readings, "y": crop}


def _mp_gradient(activation, reduce, params, inputs, name, k):
    """d loss / d params[name].flat[k] at the float32 values, by mpmath.diff at 50 digits."""
    act = ACTIVATIONS[activation][2]
    with mpmath.workdps(50):
        x = [[mpmath.mpf(float(v)) for v in row] for row in inputs["x"]]
        y = [mpmath.mpf(float(v)) for v in inputs["y"].reshape(-1)]
        p = {n: [mpmath.mpf(float(v)) for v in a.reshape(-1)] for n, a in params.items()}
        width = params["b1"].size

        def loss(t):
            q = {n: list(v) for n, v in p.items()}
            q[name][k] = p[name][k] + t
            total = mpmath.mpf(0)
            for row, target in zip(x, y):
                h = [act(sum(row[j] * q["W1"][j * width + c] for j in range(len(row))) + q["b1"][c]) for c in range(width)]
                r = sum(h[c] * q["W2"][c] for c in range(width)) + q["b2"][0] - target
                total += r * r
            return total / len(y) if reduce == "mean" else total

        return float(mpmath.diff(loss, 0))


CONFIGS = [(0, "tanh", 4, 8, "mean"), (1, "sigmoid", 6, 12, "sum"), (2, "softplus", 4, 10, "mean")]


@pytest.mark.parametrize("seed,activation,width,rows,reduce", CONFIGS)
def test_zero_biases_of_a_correct_float32_network_are_resolved(seed, activation, width, rows, reduce):
    # Biases all at 0 give their tensor no scale of its own: the wide steps narrow arithmetic
    # needs were held to a quarter of the first step, and every bias element was left
    # undecided. Now each one the loss's float32 rounding resolves passes; one far below its
    # tensor's scale (a unit that barely moves the loss: seed 0's third, 1/11000 of the rms,
    # whose threshold is 5e-8 absolute against a loss rounding of about 1e-7) stays
    # undecided, and says the smallest relative error it could have seen.
    forward, backward, params, inputs = _yields(seed, activation, width, rows, reduce)
    grads = backward(params, inputs)
    exact = np.array([_mp_gradient(activation, reduce, params, inputs, "b1", k) for k in range(width)])
    assert np.all(np.abs(grads["b1"] - exact) <= 1e-4 * np.maximum(np.abs(exact), 1e-3)), (grads["b1"], exact)
    report = probe(forward, backward, params, inputs)
    assert report.threshold == THRESHOLD
    assert report.failed == 0
    assert report.tensor("b2").status.value == "pass", report.tensor("b2").inconclusive_reason
    b1 = report.tensor("b1")
    rms = np.sqrt(np.mean(exact**2))
    undecided = {d.index[0]: d.reason for d in b1.details if d.status.value == "inconclusive"}
    assert b1.status.value in ("pass", "inconclusive")
    assert (b1.status.value == "pass") == (not undecided)
    for k, reason in undecided.items():
        assert abs(exact[k]) < 1e-2 * rms, (k, exact[k], rms)
        assert "hides any relative error below" in reason, reason


@pytest.mark.parametrize("seed,activation,width,rows,reduce", CONFIGS)
def test_a_bias_element_half_a_percent_off_fails_and_is_located(seed, activation, width, rows, reduce):
    forward, backward, params, inputs = _yields(seed, activation, width, rows, reduce)
    grads = backward(params, inputs)["b1"].astype(np.float64)
    k = int(np.argmax(np.abs(grads)))  # an element of ordinary size for its tensor
    forward, backward, params, inputs = _yields(seed, activation, width, rows, reduce, bug=("b1", k, 1.005))
    exact = _mp_gradient(activation, reduce, params, inputs, "b1", k)
    assert abs(backward(params, inputs)["b1"][k] / exact - 1) > 1.5 * THRESHOLD  # the bug, as mpmath sees it
    report = probe(forward, backward, params, inputs)
    b1 = report.tensor("b1")
    assert b1.status.value == "fail", (b1.status, b1.inconclusive_reason)
    assert (k,) in b1.bad_indices
    assert all(t.status.value != "fail" for t in report.tensors if t.name != "b1")


def test_a_bug_under_a_loose_pass_bound_fails():
    # A bias element a tenth of its tensor's typical gradient, 0.5% too large: the first
    # steps' estimate agreed with it within the threshold at a bound of 3.8% (its own error
    # cancelled the bug) and it passed; the wide steps bound it to about 0.13%.
    rng = np.random.default_rng(0)
    readings = rng.normal(size=(32, 6)).astype(np.float32)
    crop = rng.normal(size=(32, 1)).astype(np.float32)
    params = {"W1": (rng.normal(size=(6, 10)) * 0.5).astype(np.float32), "b1": np.zeros(10, np.float32),
              "W2": (rng.normal(size=(10, 1)) * 0.5).astype(np.float32), "b2": np.zeros(1, np.float32)}

    def forward(p, i):
        r = np.tanh(i["x"] @ p["W1"] + p["b1"]) @ p["W2"] + p["b2"] - i["y"]
        return np.float32(np.mean(r * r))

    def backward(p, i):
        h = np.tanh(i["x"] @ p["W1"] + p["b1"])
        d = 2 * (h @ p["W2"] + p["b2"] - i["y"]) / h.shape[0]
        dz = (d @ p["W2"].T) * (1 - h * h)
        g = {"W1": i["x"].T @ dz, "b1": dz.sum(0), "W2": h.T @ d, "b2": d.sum(0)}
        g["b1"] = g["b1"].copy()
        g["b1"][5] *= 1.005
        return g

    inputs = {"x": readings, "y": crop}
    exact = _mp_gradient("tanh", "mean", params, inputs, "b1", 5)
    analytic = float(backward(params, inputs)["b1"][5])
    assert abs(analytic / exact - 1) > 1.5 * THRESHOLD
    b1 = probe(forward, backward, params, inputs).tensor("b1")
    assert b1.status.value == "fail", (b1.status, b1.inconclusive_reason)
    assert b1.bad_indices == ((5,),)


@pytest.mark.parametrize("seed,activation,width,rows,reduce", CONFIGS)
def test_a_pass_above_the_threshold_is_explained(seed, activation, width, rows, reduce):
    # A passing tensor whose worst bound lies above the threshold (float32 rounding resolves
    # no tighter) says so in a note naming the tensor: its pass holds the relative error below
    # the threshold plus that bound. Checked against mpmath on every element: the pass is true.
    forward, backward, params, inputs = _yields(seed, activation, width, rows, reduce)
    report = probe(forward, backward, params, inputs)
    def widest(t):  # the largest relative bound among its coordinates
        return float(np.max(t.coordinates.noise))

    loose = [t for t in report.tensors if t.status.value == "pass" and widest(t) > report.threshold]
    assert all(t.worst_noise <= widest(t) for t in report.tensors)
    for t in loose:
        said = [n for n in report.notes if n.startswith(f"{t.name}: ")]
        assert said and "above the threshold" in said[0], report.notes
        bound = float(said[0].split("up to ")[1].split(" ")[0])
        assert bound >= 0.95 * widest(t)  # two digits
        grads = backward(params, inputs)[t.name].reshape(-1)
        for k in range(min(grads.size, 6)):
            exact = _mp_gradient(activation, reduce, params, inputs, t.name, k)
            rms = float(np.sqrt(np.mean(grads.astype(np.float64) ** 2)))
            assert abs(grads[k] - exact) / max(abs(exact), 1e-3 * rms) <= report.threshold + bound
    quiet = [t for t in report.tensors if t.status.value == "pass" and widest(t) <= report.threshold]
    assert not any(n.startswith(f"{t.name}: ") for t in quiet for n in report.notes)
