"""``gradprobe starter PATH``: a commented target that runs as it is, to start from."""

from __future__ import annotations

from pathlib import Path

from ..common.errors import UsageProblem

TEMPLATE = '''"""A gradprobe target. Check it with:  gradprobe check {path}

It runs as it is, on a small layer of its own: weekly shop demand predicted from store
features with a softplus layer and a squared-error loss. Replace the three functions with
your own code, keeping their signatures.
"""

import numpy as np


def setup():
    """Return (params, inputs): mappings of name -> array. Nest them to name layers:
    {{"hidden": {{"W": ...}}}} is the tensor hidden.W in the layer hidden."""
    rng = np.random.default_rng(0)
    params = {{"demand": {{"W": rng.normal(scale=0.5, size=(4, 2)), "b": np.zeros(2)}}}}
    inputs = {{
        "features": rng.normal(size=(8, 4)),   # 8 stores, 4 features each
        "sales": rng.normal(size=(8, 2)),      # observed demand for 2 products
    }}
    return params, inputs


def forward(params, inputs):
    """Return the scalar loss (or an output array; then backward takes grad_output)."""
    z = inputs["features"] @ params["demand"]["W"] + params["demand"]["b"]
    prediction = np.logaddexp(0.0, z)  # softplus
    return 0.5 * np.sum((prediction - inputs["sales"]) ** 2)


def backward(params, inputs):
    """Return the gradient of the loss with the same nesting as params. Gradients for
    inputs are optional; when present they are checked too."""
    z = inputs["features"] @ params["demand"]["W"] + params["demand"]["b"]
    prediction = np.logaddexp(0.0, z)
    dz = (prediction - inputs["sales"]) / (1.0 + np.exp(-z))  # softplus' is the sigmoid
    return {{
        "demand": {{"W": inputs["features"].T @ dz, "b": dz.sum(axis=0)}},
        "features": dz @ params["demand"]["W"].T,
    }}
'''


STACK_TEMPLATE = '''"""A gradprobe stack target. Check it with:  gradprobe check {path}

It runs as it is: weekly shop demand predicted from store features by three layers, each
with its own forward and backward. gradprobe composes the network itself, checks every
layer's backward on its own and the whole stack end to end, and says in which layer an
error enters. Replace the layers with your own, keeping their signatures.
"""

import numpy as np


class Dense:
    """y = x @ W + b. forward gets the layer's own params, the activation arriving at it
    and the whole inputs mapping; backward also gets grad_y, the gradient of the loss with
    respect to y, and returns (gradients of its params, gradient of x)."""

    def __init__(self, name):
        self.name = name

    def forward(self, params, x, inputs):
        return x @ params["W"] + params["b"]

    def backward(self, params, x, inputs, grad_y):
        return {{"W": x.T @ grad_y, "b": grad_y.sum(axis=0)}}, grad_y @ params["W"].T


class Softplus:
    """A layer with no params: its backward returns {{}} and the gradient of x."""

    name = "softplus"

    def forward(self, params, x, inputs):
        return np.logaddexp(0.0, x)

    def backward(self, params, x, inputs, grad_y):
        return {{}}, grad_y / (1.0 + np.exp(-x))  # softplus' is the sigmoid


class SquaredError:
    """The last layer returns the scalar loss; its grad_y is 1.0."""

    name = "loss"

    def forward(self, params, x, inputs):
        return 0.5 * np.sum((x - inputs["sales"]) ** 2)

    def backward(self, params, x, inputs, grad_y):
        return {{}}, grad_y * (x - inputs["sales"])


layers = [Dense("hidden"), Softplus(), Dense("demand"), SquaredError()]  # input side first


def setup():
    """Return (params, inputs): params maps each layer's name to its own arrays (a layer
    without params may be left out); inputs holds x, the first layer's input, and any
    other arrays the layers need."""
    rng = np.random.default_rng(0)
    params = {{
        "hidden": {{"W": rng.normal(scale=0.5, size=(4, 6)), "b": np.zeros(6)}},
        "demand": {{"W": rng.normal(scale=0.5, size=(6, 2)), "b": np.zeros(2)}},
    }}
    inputs = {{
        "x": rng.normal(size=(8, 4)),      # 8 stores, 4 features each
        "sales": rng.normal(size=(8, 2)),  # observed demand for 2 products
    }}
    return params, inputs
'''


def starter_text(path: str, stack: bool = False) -> str:
    return (STACK_TEMPLATE if stack else TEMPLATE).format(path=path)


def write_starter(path: Path, force: bool = False, stack: bool = False) -> None:
    """Write the starter target (a stack of layers with ``stack``) to ``path``; never
    overwrites without ``force``."""
    if path.exists() and not force:
        raise UsageProblem(f"{path} already exists; pass --force to overwrite it", value=str(path))
    if not path.parent.exists():
        raise UsageProblem(f"the folder {path.parent} does not exist", value=str(path))
    path.write_text(starter_text(str(path), stack))
