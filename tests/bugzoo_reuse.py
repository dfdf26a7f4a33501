"""Purpose-made targets where a value is reused: repeated indices, overlapping windows, a
recurrence over time steps, a stack of layers; each with the bug its hint names, and decoys:
a different bug whose numbers look alike, which must get no hint or one naming both causes.

The data are invented (products in shopping baskets, hourly store footfall, a week of sensor
readings); kinds group the cases for the tally per bug class.
"""

from __future__ import annotations

import numpy as np
from bugzoo import Case

# ---------------------------------------------------------------- embedding lookup

BASKET = np.array([1, 4, 4, 7, 2, 4, 9, 1, 0, 5, 3, 6, 8, 8])  # products bought; 1, 4, 8 repeat


def _embedding_data():
    rng = np.random.default_rng(23)
    params = {"embed": {"table": rng.normal(size=(10, 3))}, "head": {"W": rng.normal(size=(3, 2))}}
    return params, {"idx": BASKET.copy(), "y": rng.normal(size=(BASKET.size, 2))}


def _embedding_parts(p, i):
    e = p["embed"]["table"][i["idx"]]
    return e, np.tanh(e @ p["head"]["W"])


def embedding_forward(p, i):
    _, h = _embedding_parts(p, i)
    return float(0.5 * np.sum((h - i["y"]) ** 2))


def embedding_backward(p, i, scatter, derivative=lambda h: 1 - h**2):
    """The lookup's backward with ``scatter(table_grad, idx, rows)`` putting rows back."""
    e, h = _embedding_parts(p, i)
    dz = (h - i["y"]) * derivative(h)
    table = np.zeros_like(p["embed"]["table"])
    scatter(table, i["idx"], dz @ p["head"]["W"].T)
    return {"embed": {"table": table}, "head": {"W": e.T @ dz}}


def _assign(g, idx, rows):
    g[idx] = rows  # a repeated index keeps its last row only


def _average(g, idx, rows):
    np.add.at(g, idx, rows)
    g /= np.maximum(np.bincount(idx, minlength=len(g)), 1)[:, None]


def embedding_mixed_signs_assigned():
    params, inputs = _embedding_data()
    return Case("embedding rows of mixed sign assigned", embedding_forward,
                lambda p, i: embedding_backward(p, i, _assign), params, inputs,
                {"embed.table": "assigned instead of accumulated"}, "repeated index")


def embedding_rows_averaged():
    """Decoy: wrong exactly at the repeated rows, but the repeats are averaged, not assigned."""
    params, inputs = _embedding_data()
    return Case("embedding rows averaged over repeats (decoy)", embedding_forward,
                lambda p, i: embedding_backward(p, i, _average), params, inputs,
                {"embed.table": None}, "repeated index decoy")


def embedding_wrong_upstream():
    """Decoy: every used row is wrong (tanh' taken as 1 - t above the lookup)."""
    params, inputs = _embedding_data()
    return Case("embedding under a wrong activation derivative (decoy)", embedding_forward,
                lambda p, i: embedding_backward(p, i, np.add.at, lambda h: 1 - h), params, inputs,
                {"embed.table": None, "head.W": None}, "repeated index decoy")


# ---------------------------------------------------------------- 1-D convolution

def _conv_data():
    rng = np.random.default_rng(41)
    params = {"smooth": {"k": rng.normal(size=4)}}
    return params, {"footfall": rng.normal(size=18), "target": rng.normal(size=15)}


def conv_forward(p, i):
    out = np.correlate(i["footfall"], p["smooth"]["k"], mode="valid")
    return float(0.5 * np.sum((out - i["target"]) ** 2))


def conv_backward(p, i, accumulate=True, average=False):
    k = p["smooth"]["k"]
    r = np.correlate(i["footfall"], k, mode="valid") - i["target"]
    dx = np.zeros_like(i["footfall"])
    for j in range(r.size):  # window j covers footfall[j:j + len(k)]
        if accumulate:
            dx[j:j + k.size] += r[j] * k
        else:
            dx[j:j + k.size] = r[j] * k  # overlapping windows overwrite each other
    if average:
        dx /= np.convolve(np.ones(r.size), np.ones(k.size))  # windows covering each element
    return {"smooth": {"k": np.correlate(i["footfall"], r, mode="valid")}, "footfall": dx}


def conv_assigned_per_window():
    params, inputs = _conv_data()
    return Case("1-D convolution input gradient assigned per window", conv_forward,
                lambda p, i: conv_backward(p, i, accumulate=False), params, inputs,
                {"footfall": "assigned per window"}, "overlapping windows")


def conv_averaged_over_windows():
    """Decoy: wrong exactly where windows overlap, but divided by the overlap count."""
    params, inputs = _conv_data()
    return Case("1-D convolution input gradient averaged over windows (decoy)", conv_forward,
                lambda p, i: conv_backward(p, i, average=True), params, inputs,
                {"footfall": None}, "overlapping windows decoy")


def conv_flipped_kernel():
    """Decoy: the input gradient uses the kernel reversed: wrong almost everywhere."""
    params, inputs = _conv_data()

    def backward(p, i):
        g = conv_backward(p, i)
        r = np.correlate(i["footfall"], p["smooth"]["k"], mode="valid") - i["target"]
        g["footfall"] = np.convolve(r, p["smooth"]["k"][::-1])
        return g

    return Case("1-D convolution with the kernel reversed in backward (decoy)", conv_forward,
                backward, params, inputs, {"footfall": None}, "overlapping windows decoy")


# ---------------------------------------------------------------- recurrent cell

T, D, H = 6, 3, 4  # a week of daily sensor readings: 6 steps, 3 sensors, 4 hidden units


def _rnn_data():
    rng = np.random.default_rng(13)
    params = {"cell": {"Wx": rng.normal(scale=0.5, size=(D, H)), "Wh": rng.normal(scale=0.4, size=(H, H)),
                       "b": rng.normal(scale=0.1, size=H)}}
    inputs = {"x": rng.normal(size=(T, D)), "h0": rng.normal(scale=0.5, size=H), "y": rng.normal(size=(T, H))}
    return params, inputs


def _rnn_states(p, i):
    hs = [i["h0"]]
    for t in range(T):
        hs.append(np.tanh(i["x"][t] @ p["cell"]["Wx"] + hs[-1] @ p["cell"]["Wh"] + p["cell"]["b"]))
    return hs


def rnn_forward(p, i, last_only=False):
    hs = np.array(_rnn_states(p, i)[1:])
    if last_only:
        return float(0.5 * np.sum((hs[-1] - i["y"][-1]) ** 2))
    return float(0.5 * np.sum((hs - i["y"]) ** 2))


def rnn_backward(p, i, accumulate=True, carry=True, last_only=False):
    """Backward through time, steps in reverse; ``carry=False`` drops the path back."""
    c = p["cell"]
    hs = _rnn_states(p, i)
    g = {"Wx": np.zeros_like(c["Wx"]), "Wh": np.zeros_like(c["Wh"]), "b": np.zeros_like(c["b"])}
    dx = np.zeros_like(i["x"])
    dh_next = np.zeros(H)
    for t in reversed(range(T)):
        local = np.zeros(H) if last_only and t < T - 1 else hs[t + 1] - i["y"][t]
        dz = (local + (dh_next if carry else 0.0)) * (1 - hs[t + 1] ** 2)
        terms = {"Wx": np.outer(i["x"][t], dz), "Wh": np.outer(hs[t], dz), "b": dz}
        for name, term in terms.items():
            if accumulate:
                g[name] += term
            else:
                g[name] = term  # each step overwrites the one after it
        dx[t] = dz @ c["Wx"].T
        dh_next = dz @ c["Wh"].T
    return {"cell": g, "x": dx}


def rnn_assigned_per_step():
    params, inputs = _rnn_data()
    hint = "assigned instead of accumulated (+=) in a loop over those items"
    return Case("recurrent weights assigned per time step", rnn_forward,
                lambda p, i: rnn_backward(p, i, accumulate=False), params, inputs,
                {"cell.Wx": hint, "cell.Wh": hint, "cell.b": hint}, "time steps")


def rnn_no_path_back():
    """Decoy: the path back through time is missing; a loss at every step keeps all terms."""
    params, inputs = _rnn_data()
    return Case("recurrence without its path back through time (decoy)", rnn_forward,
                lambda p, i: rnn_backward(p, i, carry=False), params, inputs,
                {"cell.Wx": None, "cell.Wh": None, "cell.b": None, "x": None}, "time steps decoy")


def rnn_no_path_back_last_loss():
    """Decoy: no path back and a loss on the last step only: the analytic gradients are the
    last step's term alone, as assignment would leave them, so both causes must be named."""
    params, inputs = _rnn_data()
    both = "not carried back"
    return Case("recurrence without its path back, loss on the last step (decoy)",
                lambda p, i: rnn_forward(p, i, last_only=True),
                lambda p, i: rnn_backward(p, i, carry=False, last_only=True), params, inputs,
                {"cell.Wx": both, "cell.Wh": both, "cell.b": both, "x": both}, "time steps decoy")


def dense_assigned_per_sample():
    """A per-sample loop that assigns dW; dx is returned and right, so the path back is intact."""
    rng = np.random.default_rng(31)
    params = {"dense": {"W": rng.normal(scale=0.5, size=(4, 3))}}
    inputs = {"x": rng.normal(size=(8, 4)), "y": rng.normal(size=(8, 3))}

    def forward(p, i):
        return float(0.5 * np.sum((np.tanh(i["x"] @ p["dense"]["W"]) - i["y"]) ** 2))

    def backward(p, i):
        h = np.tanh(i["x"] @ p["dense"]["W"])
        dz = (h - i["y"]) * (1 - h**2)
        dW = np.zeros_like(p["dense"]["W"])
        for n in range(len(dz)):
            dW = np.outer(i["x"][n], dz[n])  # one sample's term replaces the others
        return {"dense": {"W": dW}, "x": dz @ p["dense"]["W"].T}

    return Case("dense weight assigned per sample in a loop", forward, backward, params, inputs,
                {"dense.W": "analytic holds only the term of item 7 (of 8) of x, not the sum over "
                            "all items: it is assigned instead of accumulated (+=) in a loop over "
                            "those items"}, "time steps")


def dense_mean_product():
    """Decoy: dW taken as outer(mean input, summed residual): one outer product, but of no
    single sample's input, so it is not one sample's term of the sum."""
    rng = np.random.default_rng(29)
    params = {"dense": {"W": rng.normal(scale=0.5, size=(4, 3))}}
    inputs = {"x": rng.normal(size=(16, 4)), "y": rng.normal(size=(16, 3))}

    def forward(p, i):
        return float(0.5 * np.sum((i["x"] @ p["dense"]["W"] - i["y"]) ** 2))

    def backward(p, i):
        r = i["x"] @ p["dense"]["W"] - i["y"]
        return {"dense": {"W": np.outer(i["x"].mean(axis=0), r.sum(axis=0))}}

    return Case("dense weight from the mean input (decoy)", forward, backward, params, inputs,
                {"dense.W": None}, "time steps decoy")


# ---------------------------------------------------------------- three-layer network

def _mlp_data():
    rng = np.random.default_rng(37)
    params = {name: {"W": rng.normal(scale=0.6, size=(4, 4)), "b": rng.normal(scale=0.1, size=4)}
              for name in ("l1", "l2", "l3")}
    return params, {"x": rng.normal(size=(8, 4)), "y": rng.normal(size=(8, 4))}


def _mlp_states(p, i):
    hs = [i["x"]]
    for name in ("l1", "l2"):
        hs.append(np.tanh(hs[-1] @ p[name]["W"] + p[name]["b"]))
    return hs


def mlp_forward(p, i):
    hs = _mlp_states(p, i)
    out = hs[-1] @ p["l3"]["W"] + p["l3"]["b"]
    return float(0.5 * np.sum((out - i["y"]) ** 2))


def mlp_backward(p, i, input_grad=lambda d, W: d @ W.T, derivative=lambda h: 1 - h**2):
    """``input_grad(d, W)``: what l2 passes back; ``derivative``: tanh' after l1."""
    hs = _mlp_states(p, i)
    d = hs[-1] @ p["l3"]["W"] + p["l3"]["b"] - i["y"]
    g = {"l3": {"W": hs[2].T @ d, "b": d.sum(axis=0)}}
    d = (d @ p["l3"]["W"].T) * (1 - hs[2] ** 2)
    g["l2"] = {"W": hs[1].T @ d, "b": d.sum(axis=0)}
    d = input_grad(d, p["l2"]["W"]) * derivative(hs[1])
    g["l1"] = {"W": hs[0].T @ d, "b": d.sum(axis=0)}
    return g


STACK = "the gradient l2 passes back"


def mlp_wrong_input_gradient():
    params, inputs = _mlp_data()
    return Case("three layers, l2 passes back d @ W instead of d @ W.T", mlp_forward,
                lambda p, i: mlp_backward(p, i, input_grad=lambda d, W: d @ W), params, inputs,
                {"l1.W": STACK, "l1.b": STACK}, "layer boundary")


def mlp_wrong_activation():
    """Decoy: the same failing tensors from tanh' taken as 1 - t after l1: the hint names it."""
    params, inputs = _mlp_data()
    both = "or the derivative of an activation between l1 and l2"
    return Case("three layers, tanh' after l1 taken as 1 - t (decoy)", mlp_forward,
                lambda p, i: mlp_backward(p, i, derivative=lambda h: 1 - h), params, inputs,
                {"l1.W": both, "l1.b": both}, "layer boundary decoy")


def mlp_own_bugs_in_l1():
    """Decoy: l1's own tensors are wrong (transposed weight, negated bias): no boundary hint."""
    params, inputs = _mlp_data()

    def backward(p, i):
        g = mlp_backward(p, i)
        g["l1"] = {"W": g["l1"]["W"].T, "b": -g["l1"]["b"]}
        return g

    return Case("three layers, l1's own gradients wrong (decoy)", mlp_forward, backward, params, inputs,
                {"l1.W": "transposed", "l1.b": "sign is flipped"}, "layer boundary decoy")


def mlp_boundary_and_last_bias():
    """Decoy: l2 passes back a wrong gradient and l3's bias is doubled: not one boundary."""
    params, inputs = _mlp_data()

    def backward(p, i):
        g = mlp_backward(p, i, input_grad=lambda d, W: d @ W)
        g["l3"]["b"] = 2 * g["l3"]["b"]
        return g

    return Case("three layers, wrong l2 input gradient and doubled l3 bias (decoy)", mlp_forward,
                backward, params, inputs,
                {"l1.W": None, "l1.b": None, "l3.b": "factor 2 too many"}, "layer boundary decoy")


REUSE_CASES = [
    embedding_mixed_signs_assigned, embedding_rows_averaged, embedding_wrong_upstream,
    conv_assigned_per_window, conv_averaged_over_windows, conv_flipped_kernel,
    rnn_assigned_per_step, rnn_no_path_back, rnn_no_path_back_last_loss, dense_assigned_per_sample,
    dense_mean_product,
    mlp_wrong_input_gradient, mlp_wrong_activation, mlp_own_bugs_in_l1, mlp_boundary_and_last_bias,
]
