"""Purpose-made targets with known bugs (and correct ones) for the hint tests and the tally.

Each case is a function returning a :class:`Case`: forward, backward, params, inputs, and
``expect``: for every tensor that must fail, a phrase its hint must contain (None: it must
fail with no hint). Tensors not in ``expect`` must not fail. The data are invented (shop
demand, store sensors); the bugs are the classic slips of hand-written backward passes.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

N, K = 16, 4  # batch size and width


@dataclass
class Case:
    name: str
    forward: Callable[..., Any]
    backward: Callable[..., Any]
    params: dict
    inputs: dict
    expect: dict[str, str | None] = field(default_factory=dict)
    kind: str = "correct"  # the bug class, for the tally per class


def _dense_data(square: bool = True):
    rng = np.random.default_rng(31)
    x = rng.normal(size=(N, K))
    y = rng.normal(size=(N, K if square else 2))
    W = rng.normal(scale=0.5, size=(K, K if square else 2))
    b = rng.normal(scale=0.1, size=W.shape[1])
    return {"dense": {"W": W, "b": b}}, {"x": x, "y": y}


def _pred(p, i):
    return i["x"] @ p["dense"]["W"] + p["dense"]["b"]


def _dense_case(name, residual_scale, forward_scale, expect, transform=None, kind="factor"):
    """Squared error ``forward_scale * sum((p - y)**2)``; backward uses ``residual_scale * (p - y)``."""
    params, inputs = _dense_data()

    def forward(p, i):
        return float(forward_scale * np.sum((_pred(p, i) - i["y"]) ** 2))

    def backward(p, i):
        r = residual_scale * (_pred(p, i) - i["y"])
        g = {"dense": {"W": i["x"].T @ r, "b": r.sum(axis=0)}}
        return transform(g, p, i, r) if transform else g

    return Case(name, forward, backward, params, inputs, expect, kind if expect else "correct")


def correct_mean_squared():
    return _dense_case("mean squared error, correct", 1.0 / N, 0.5 / N, {})


def sign_flipped():
    def flip(g, p, i, r):
        g["dense"]["W"] = -g["dense"]["W"]
        return g

    return _dense_case("sign of dW flipped", 1.0 / N, 0.5 / N, {"dense.W": "sign is flipped"}, flip, "sign")


def half_not_carried():
    return _dense_case("0.5 of the squared error not carried", 2.0 / N, 0.5 / N,
                       {"dense.W": "factor 2 too many", "dense.b": "factor 2 too many"})


def factor_two_missing():
    return _dense_case("derivative of r**2 taken as r", 1.0 / N, 1.0 / N,
                       {"dense.W": "factor 2 is missing", "dense.b": "factor 2 is missing"})


def batch_mean_not_divided():
    return _dense_case("mean over the batch not divided out", 1.0, 0.5 / N,
                       {"dense.W": "the batch size", "dense.b": "the batch size"}, kind="batch size")


def batch_divided_but_summed():
    return _dense_case("backward divides by the batch, forward sums", 1.0 / N, 0.5,
                       {"dense.W": "one over the batch size", "dense.b": "one over the batch size"},
                       kind="batch size")


def transposed_weight():
    def transpose(g, p, i, r):
        g["dense"]["W"] = r.T @ i["x"]
        return g

    return _dense_case("dW computed as r.T @ x", 1.0 / N, 0.5 / N, {"dense.W": "transposed"}, transpose, "transpose")


def bias_gradient_zero():
    def zero(g, p, i, r):
        g["dense"]["b"] = np.zeros_like(p["dense"]["b"])
        return g

    return _dense_case("bias gradient left at zero", 1.0 / N, 0.5 / N, {"dense.b": "zero everywhere"}, zero, "zero")


def input_gradient_first_row_only():
    def first_row(g, p, i, r):
        dx = np.zeros_like(i["x"])
        dx[0] = r[0] @ p["dense"]["W"].T
        g["x"] = dx
        return g

    return _dense_case("dx computed for the first sample only", 1.0 / N, 0.5 / N,
                       {"x": "right only in row 0 and zero elsewhere"}, first_row, "one slice")


def random_elements_wrong():
    def noise(g, p, i, r):
        rng = np.random.default_rng(99)
        W = g["dense"]["W"].copy()
        for _ in range(3):
            W[rng.integers(K), rng.integers(K)] += rng.normal()
        g["dense"]["W"] = W
        return g

    return _dense_case("three elements of dW off at random", 1.0 / N, 0.5 / N, {"dense.W": None}, noise, "no model")


def _two_layer_data():
    rng = np.random.default_rng(17)
    params = {"enc": {"A": rng.normal(scale=0.6, size=(K, K))}, "dec": {"C": rng.normal(scale=0.6, size=(K, K))}}
    return params, {"x": rng.normal(size=(N, K)), "y": rng.normal(size=(N, K))}


def _two_layer(p, i):
    h = np.tanh(i["x"] @ p["enc"]["A"])
    return h, h @ p["dec"]["C"]


def _two_layer_forward(p, i):
    _, out = _two_layer(p, i)
    return float(0.5 * np.sum((out - i["y"]) ** 2))


def _two_layer_grads(p, i, derivative=lambda h: 1 - h**2):
    h, out = _two_layer(p, i)
    r = out - i["y"]
    dC = h.T @ r
    dA = i["x"].T @ ((r @ p["dec"]["C"].T) * derivative(h))
    return dA, dC


def swapped_gradients():
    params, inputs = _two_layer_data()

    def backward(p, i):
        dA, dC = _two_layer_grads(p, i)
        return {"enc": {"A": dC}, "dec": {"C": dA}}

    return Case("gradients of two layers swapped", _two_layer_forward, backward, params, inputs,
                {"enc.A": "swapped", "dec.C": "swapped"}, "swapped")


def wrong_activation_derivative():
    params, inputs = _two_layer_data()

    def backward(p, i):
        dA, dC = _two_layer_grads(p, i, derivative=lambda h: 1 - h)
        return {"enc": {"A": dA}, "dec": {"C": dC}}

    return Case("tanh' written as 1 - t", _two_layer_forward, backward, params, inputs, {"enc.A": None},
                "no model")


def correct_two_layer():
    params, inputs = _two_layer_data()

    def backward(p, i):
        dA, dC = _two_layer_grads(p, i)
        return {"enc": {"A": dA}, "dec": {"C": dC}}

    return Case("two tanh layers, correct", _two_layer_forward, backward, params, inputs)


def _embedding_data():
    rng = np.random.default_rng(5)
    table = rng.normal(size=(10, 3))
    idx = np.array([1, 4, 4, 7, 2, 4, 9, 1, 0, 5, 3, 6])  # products bought; 1 and 4 repeat
    weight = rng.uniform(0.5, 1.5, size=idx.size)
    return {"table": table}, {"idx": idx, "weight": weight}


def _embedding_forward(p, i):
    return float(np.sum(i["weight"][:, None] * p["table"][i["idx"]] ** 2))


def embedding_assigned():
    params, inputs = _embedding_data()

    def backward(p, i):
        g = np.zeros_like(p["table"])
        g[i["idx"]] = 2 * i["weight"][:, None] * p["table"][i["idx"]]  # repeated rows overwrite
        return {"table": g}

    return Case("embedding gradient assigned, not accumulated", _embedding_forward, backward,
                params, inputs, {"table": "assigned instead of accumulated"}, "repeated index")


def embedding_accumulated():
    params, inputs = _embedding_data()

    def backward(p, i):
        g = np.zeros_like(p["table"])
        np.add.at(g, i["idx"], 2 * i["weight"][:, None] * p["table"][i["idx"]])
        return {"table": g}

    return Case("embedding with np.add.at, correct", _embedding_forward, backward, params, inputs)


def _mixer_data():
    rng = np.random.default_rng(11)
    params = {"mix": {"W": rng.normal(scale=0.4, size=(6, 3))}, "gain": rng.uniform(0.5, 2.0, size=3)}
    return params, {"raw": rng.normal(size=(N, 6))}


def _mixer_forward(p, i):
    return p["gain"] * np.tanh(i["raw"] @ p["mix"]["W"])


def _mixer(gain_sign):
    params, inputs = _mixer_data()

    def backward(p, i, g):
        t = np.tanh(i["raw"] @ p["mix"]["W"])
        dz = g * p["gain"] * (1 - t**2)
        return {"mix": {"W": i["raw"].T @ dz}, "gain": gain_sign * (g * t).sum(axis=0)}

    return params, inputs, backward


def mixer_gain_sign():
    params, inputs, backward = _mixer(-1.0)
    return Case("vector output, gain gradient negated", _mixer_forward, backward, params, inputs,
                {"gain": "sign is flipped"}, "sign")


def mixer_correct():
    params, inputs, backward = _mixer(1.0)
    return Case("vector output, correct", _mixer_forward, backward, params, inputs)


def softmax_cross_entropy():
    """Predicting which of 5 shop departments a basket comes from."""
    rng = np.random.default_rng(8)
    params = {"head": {"W": rng.normal(scale=0.3, size=(K, 5)), "b": np.zeros(5)}}
    inputs = {"x": rng.normal(size=(N, K)), "label": rng.integers(0, 5, size=N)}

    def logits(p, i):
        return i["x"] @ p["head"]["W"] + p["head"]["b"]

    def forward(p, i):
        z = logits(p, i)
        z = z - z.max(axis=1, keepdims=True)
        logp = z - np.log(np.exp(z).sum(axis=1, keepdims=True))
        return float(-np.mean(logp[np.arange(N), i["label"]]))

    def backward(p, i):
        z = logits(p, i)
        s = np.exp(z - z.max(axis=1, keepdims=True))
        s /= s.sum(axis=1, keepdims=True)
        s[np.arange(N), i["label"]] -= 1
        s /= N
        return {"head": {"W": i["x"].T @ s, "b": s.sum(axis=0)}}

    return Case("softmax cross-entropy, correct", forward, backward, params, inputs)


def layer_norm():
    rng = np.random.default_rng(21)
    params = {"norm": {"gamma": rng.uniform(0.5, 1.5, size=6), "beta": rng.normal(size=6)}}
    inputs = {"x": rng.normal(size=(8, 6)), "w": rng.normal(size=(8, 6))}
    eps = 1e-5

    def parts(p, i):
        mu = i["x"].mean(axis=1, keepdims=True)
        var = i["x"].var(axis=1, keepdims=True)
        xhat = (i["x"] - mu) / np.sqrt(var + eps)
        return xhat, var

    def forward(p, i):
        xhat, _ = parts(p, i)
        return float(np.sum(i["w"] * (p["norm"]["gamma"] * xhat + p["norm"]["beta"])))

    def backward(p, i):
        xhat, var = parts(p, i)
        dy = i["w"]
        dxhat = dy * p["norm"]["gamma"]
        dx = (dxhat - dxhat.mean(axis=1, keepdims=True)
              - xhat * (dxhat * xhat).mean(axis=1, keepdims=True)) / np.sqrt(var + eps)
        return {"norm": {"gamma": (dy * xhat).sum(axis=0), "beta": dy.sum(axis=0)}, "x": dx}

    return Case("layer norm with input gradient, correct", forward, backward, params, inputs)


def conv1d():
    """Smoothing a week of hourly store footfall with a learned 1-D kernel."""
    rng = np.random.default_rng(3)
    params = {"smooth": {"k": rng.normal(size=5)}}
    inputs = {"signal": rng.normal(size=40), "target": rng.normal(size=36)}

    def forward(p, i):
        out = np.correlate(i["signal"], p["smooth"]["k"], mode="valid")
        return float(0.5 * np.sum((out - i["target"]) ** 2))

    def backward(p, i):
        r = np.correlate(i["signal"], p["smooth"]["k"], mode="valid") - i["target"]
        return {"smooth": {"k": np.correlate(i["signal"], r, mode="valid")}}

    return Case("1-D correlation kernel, correct", forward, backward, params, inputs)


def float32_dense():
    rng = np.random.default_rng(4)
    params = {"dense": {"W": rng.normal(size=(K, 3)).astype(np.float32)}}
    inputs = {"x": rng.normal(size=(N, K)).astype(np.float32)}

    def forward(p, i):
        return np.sum(np.tanh(i["x"] @ p["dense"]["W"]))

    def backward(p, i):
        t = np.tanh(i["x"] @ p["dense"]["W"])
        return {"dense": {"W": i["x"].T @ (1 - t**2)}}

    return Case("float32 tanh layer, correct", forward, backward, params, inputs)


def bilinear():
    rng = np.random.default_rng(12)
    params = {"score": {"M": rng.normal(scale=0.2, size=(K, K))}}
    inputs = {"q": rng.normal(size=(N, K)), "k": rng.normal(size=(N, K))}

    def forward(p, i):
        s = np.sum((i["q"] @ p["score"]["M"]) * i["k"], axis=1)
        return float(np.sum(np.log1p(np.exp(s))))

    def backward(p, i):
        s = np.sum((i["q"] @ p["score"]["M"]) * i["k"], axis=1)
        w = 1 / (1 + np.exp(-s))
        return {"score": {"M": i["q"].T @ (w[:, None] * i["k"])}}

    return Case("bilinear score with softplus, correct", forward, backward, params, inputs)


CASES = [
    correct_mean_squared, sign_flipped, half_not_carried, factor_two_missing,
    batch_mean_not_divided, batch_divided_but_summed, transposed_weight, bias_gradient_zero,
    input_gradient_first_row_only, random_elements_wrong, swapped_gradients,
    wrong_activation_derivative, correct_two_layer, embedding_assigned, embedding_accumulated,
    mixer_gain_sign, mixer_correct, softmax_cross_entropy, layer_norm, conv1d, float32_dense,
    bilinear,
]


@dataclass
class Tally:
    """How the hints of a set of cases came out, in all and per bug class.

    A failing tensor counts as a right hint when its hint contains the expected phrase; as
    rightly silent when it has none and none was expected (a random error or a decoy fits no
    single cause); as no hint when a hint was expected but none came; as a wrong hint when it
    has a hint where none, or another, was expected.
    """

    right_hint: int = 0
    silent: int = 0  # failing tensors with no hint, none expected
    no_hint: int = 0  # failing tensors with no hint where one was expected
    wrong_hint: int = 0
    missed: int = 0  # tensors expected to fail that passed
    false_failures: int = 0  # tensors expected to pass that failed
    correct_tensors: int = 0
    per_kind: dict[str, list[int]] = field(default_factory=dict)  # [right, silent, none, wrong]
    lines: list[str] = field(default_factory=list)

    def _count(self, kind: str, slot: int) -> None:
        self.per_kind.setdefault(kind, [0, 0, 0, 0])[slot] += 1

    def add(self, case: Case, report) -> None:
        for t in report.tensors:
            want = case.expect.get(t.name, "pass") if t.name in case.expect else "pass"
            if want == "pass":
                self.correct_tensors += 1
                if t.status == "fail":
                    self.false_failures += 1
                    self.lines.append(f"{case.name}: {t.name} failed but is correct")
                continue
            if t.status != "fail":
                self.missed += 1
                self.lines.append(f"{case.name}: {t.name} expected to fail, got {t.status}")
            elif want is None and not t.hint:
                self.silent += 1
                self._count(case.kind, 1)
            elif want is None:
                self.wrong_hint += 1
                self._count(case.kind, 3)
                self.lines.append(f"{case.name}: {t.name} got hint {t.hint!r}, expected none")
            elif t.hint and want in t.hint:
                self.right_hint += 1
                self._count(case.kind, 0)
            elif t.hint:
                self.wrong_hint += 1
                self._count(case.kind, 3)
                self.lines.append(f"{case.name}: {t.name} hint {t.hint!r} lacks {want!r}")
            else:
                self.no_hint += 1
                self._count(case.kind, 2)
                self.lines.append(f"{case.name}: {t.name} has no hint, expected {want!r}")
