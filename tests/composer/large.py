"""Large multilayer networks (ReLU and its tanh twin) for the sampled and directional plan.

The same graph machinery as the small networks: dense layers with broadcast biases, one
activation kind, a mean squared error. The bug is one element of the biggest weight's gradient
1% off or set to zero, at an element whose gradient is at least 30% of that tensor's largest.
"""

from __future__ import annotations

from itertools import pairwise

import numpy as np

from .graph import Bug, Net, Node

BENCH_SIZES = (300, 512, 256, 16)  # 153,600 + 131,072 + 4,096 weights + 784 biases = 289,552
CI_SIZES = (96, 128, 128, 16)  # 12,288 + 16,384 + 2,048 weights + 272 biases = 30,992


def mlp(seed: int, sizes: tuple[int, ...], activation: str, batch: int = 32) -> Net:
    """A correct MLP ``sizes[0] -> ... -> sizes[-1]`` with ``activation`` between layers."""
    rng = np.random.default_rng(seed)
    params: dict[str, np.ndarray] = {}
    nodes: list[Node] = []
    h = "i:x"
    for layer, (d_in, d_out) in enumerate(pairwise(sizes), start=1):
        params[f"layer{layer}.W"] = rng.normal(size=(d_in, d_out)) * np.sqrt(2.0 / d_in)
        params[f"layer{layer}.b"] = 0.1 * rng.normal(size=d_out)
        nodes.append(Node(f"mm{layer}", "matmul", (h, f"p:layer{layer}.W")))
        nodes.append(Node(f"pre{layer}", "add_bias", (f"mm{layer}", f"p:layer{layer}.b")))
        h = f"pre{layer}"
        if layer < len(sizes) - 1:
            nodes.append(Node(f"act{layer}", activation, (h,)))
            h = f"act{layer}"
    inputs = {"x": rng.normal(size=(batch, sizes[0])), "y": rng.normal(size=(batch, sizes[-1]))}
    nodes.append(Node("res", "sub", (h, "i:y")))
    nodes.append(Node("sq", "square", ("res",)))
    nodes.append(Node("loss", "mean", ("sq",), (("axis", None),)))
    n = sum(v.size for v in params.values())
    return Net(nodes, params, inputs, "loss", True, np.dtype(np.float64),
               f"{activation} MLP {'-'.join(map(str, sizes))}, {n:,} params, batch {batch}")


def biggest_weight(net: Net) -> str:
    return max((k for k in net.params if k.endswith(".W")), key=lambda k: net.params[k].size)


def one_element_bug(net: Net, factor: float, seed: int = 0) -> Net:
    """``net`` with one element of its biggest weight's gradient multiplied by ``factor``."""
    name = biggest_weight(net)
    g = net.backward(net.params, net.inputs)[name]
    picks = np.argwhere(np.abs(g) >= 0.3 * np.max(np.abs(g)))
    index = tuple(int(v) for v in picks[np.random.default_rng(seed).integers(len(picks))])
    return net.with_bug(Bug("element", tensor=name, factor=factor, index=index))
