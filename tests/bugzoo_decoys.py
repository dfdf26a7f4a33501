"""Decoys for the whole-tensor hints: a different bug whose numbers look like the named one
(most elements off by a sign, a factor near 2, a factor that is not the batch size, a
reordered matrix, zeros from a mask, a one-way exchange). Each must get no hint, the generic
one, or a hint naming both causes. Invented data: shop demand per store and product.
"""

from __future__ import annotations

import numpy as np
from bugzoo import Case

N, K = 16, 4


def _data(seed=51, width=K):
    rng = np.random.default_rng(seed)
    params = {"dense": {"W": rng.normal(scale=0.5, size=(K, width))}}
    return params, {"x": rng.normal(size=(N, K)), "y": rng.normal(size=(N, width))}


def _residual(p, i):
    return i["x"] @ p["dense"]["W"] - i["y"]


def _squared(p, i):
    return float(0.5 / N * np.sum(_residual(p, i) ** 2))


def abs_loss_slope_one():
    """Sign decoy: |r|' taken as 1, so about half the terms have the wrong sign."""
    params, inputs = _data()

    def forward(p, i):
        return float(np.sum(np.abs(_residual(p, i))))

    def backward(p, i):
        return {"dense": {"W": i["x"].T @ np.ones_like(_residual(p, i))}}

    return Case("absolute error with slope 1 everywhere (decoy)", forward, backward, params, inputs,
                {"dense.W": None}, "sign decoy")


def symmetric_off_diagonal_doubled():
    """Factor decoy: a quadratic form's gradient doubled off the diagonal only."""
    rng = np.random.default_rng(52)
    params = {"form": {"M": rng.normal(size=(K, K))}}
    inputs = {"x": rng.normal(size=(N, K)), "c": rng.uniform(0.5, 1.5, size=N)}

    def forward(p, i):
        return float(np.sum(i["c"] * np.einsum("nj,jk,nk->n", i["x"], p["form"]["M"], i["x"])))

    def backward(p, i):
        g = i["x"].T @ (i["c"][:, None] * i["x"])
        return {"form": {"M": 2 * g - np.diag(np.diag(g))}}

    return Case("quadratic form, gradient doubled off the diagonal (decoy)", forward, backward,
                params, inputs, {"form.M": None}, "factor decoy")


def half_the_batch():
    """Factor-1/2 decoy: backward sums over the first half of the batch only."""
    params, inputs = _data()

    def backward(p, i):
        r = _residual(p, i) / N
        return {"dense": {"W": i["x"][: N // 2].T @ r[: N // 2]}}

    return Case("backward over half the batch (decoy)", _squared, backward, params, inputs,
                {"dense.W": None}, "factor decoy")


def divided_by_width():
    """Batch-size decoy: backward divides by the width (4) where forward divides by N (16)."""
    params, inputs = _data()

    def backward(p, i):
        return {"dense": {"W": i["x"].T @ _residual(p, i) / K}}

    return Case("backward divides by the width, not the batch (decoy)", _squared, backward, params,
                inputs, {"dense.W": "analytic is 4 x numeric everywhere: a constant factor is wrong"},
                "batch size decoy")


def summed_but_divided_by_width():
    """1/B decoy: forward sums, backward divides by the width (4), not by the batch (16)."""
    params, inputs = _data()

    def forward(p, i):
        return float(0.5 * np.sum(_residual(p, i) ** 2))

    def backward(p, i):
        return {"dense": {"W": i["x"].T @ _residual(p, i) / K}}

    return Case("forward sums, backward divides by the width (decoy)", forward, backward, params,
                inputs, {"dense.W": "analytic is 0.25 x numeric everywhere: a constant factor is wrong"},
                "batch size decoy")


def rows_reversed():
    """Transpose decoy: the square weight gradient with its rows in reverse order."""
    params, inputs = _data()

    def backward(p, i):
        return {"dense": {"W": (i["x"].T @ _residual(p, i) / N)[::-1]}}

    return Case("weight gradient rows reversed (decoy)", _squared, backward, params, inputs,
                {"dense.W": None}, "transpose decoy")


def relu_mask_shifted():
    """Zero decoy: a ReLU's backward masks p > 0.3 instead of p > 0: zeros from a mask."""
    rng = np.random.default_rng(54)
    params = {"gate": {"p": np.array([0.8, -0.4, 0.1, 1.2, 0.25, -0.9, 0.6, 0.05])}}
    inputs = {"w": rng.uniform(0.5, 1.5, size=8)}

    def forward(p, i):
        return float(np.sum(i["w"] * np.maximum(p["gate"]["p"], 0.0) ** 2))

    def backward(p, i):
        q = p["gate"]["p"]
        return {"gate": {"p": 2 * i["w"] * q * (q > 0.3)}}

    return Case("ReLU mask at 0.3 instead of 0 (decoy)", forward, backward, params, inputs,
                {"gate.p": "analytic is zero at 3 coordinates where the numeric gradient is not: "
                           "a term is missing from backward there, or a mask zeroes it"},
                "zero decoy")


def one_way_exchange():
    """Swap decoy: the first layer gets the second's gradient, the second is right."""
    rng = np.random.default_rng(55)
    params = {"enc": {"A": rng.normal(scale=0.6, size=(K, K))}, "dec": {"C": rng.normal(scale=0.6, size=(K, K))}}
    inputs = {"x": rng.normal(size=(N, K)), "y": rng.normal(size=(N, K))}

    def forward(p, i):
        h = np.tanh(i["x"] @ p["enc"]["A"])
        return float(0.5 * np.sum((h @ p["dec"]["C"] - i["y"]) ** 2))

    def backward(p, i):
        h = np.tanh(i["x"] @ p["enc"]["A"])
        r = h @ p["dec"]["C"] - i["y"]
        dC = h.T @ r
        return {"enc": {"A": dC}, "dec": {"C": dC}}

    return Case("first layer given the second's gradient (decoy)", forward, backward, params, inputs,
                {"enc.A": None}, "swapped decoy")


def _fitted(seed):
    """Demand that the weights already fit well (residuals of 0.3), so that a weight decay
    term's gradient dominates the data term's."""
    rng = np.random.default_rng(seed)
    W = rng.normal(scale=0.5, size=(K, K))
    x = rng.normal(size=(N, K))
    return {"dense": {"W": W}}, {"x": x, "y": x @ W + rng.normal(scale=0.3, size=(N, K))}


def _with_decay(p, i):
    return _squared(p, i) + 10.0 * float(np.sum(p["dense"]["W"] ** 2))


def l2_term_left_out():
    """Factor decoy: forward adds 10 * sum(W**2), backward leaves that term out. The analytic
    values are an unrelated fraction of a percent of the numeric ones: their least-squares
    ratio is a number, but not a factor that holds element by element."""
    params, inputs = _fitted(53)

    def backward(p, i):
        return {"dense": {"W": i["x"].T @ _residual(p, i) / N}}

    return Case("weight decay term left out of backward (decoy)", _with_decay, backward, params,
                inputs, {"dense.W": None}, "factor decoy")


def transposed_and_l2_left_out():
    """Transpose decoy: the data term's gradient transposed and the weight decay term left
    out; two causes at once, so neither a transpose nor a factor explains every element."""
    params, inputs = _fitted(54)

    def backward(p, i):
        return {"dense": {"W": (i["x"].T @ _residual(p, i) / N).T}}

    return Case("transposed weight gradient, weight decay left out (decoy)", _with_decay, backward,
                params, inputs, {"dense.W": None}, "transpose decoy")

DECOY_CASES = [
    abs_loss_slope_one, symmetric_off_diagonal_doubled, half_the_batch, divided_by_width,
    summed_but_divided_by_width,
    rows_reversed, relu_mask_shifted, one_way_exchange, l2_term_left_out,
    transposed_and_l2_left_out,
]
