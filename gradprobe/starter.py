"""``gradprobe starter PATH``: a commented target that runs as it is, to start from."""

from __future__ import annotations

from pathlib import Path

from .errors import UsageProblem

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


def starter_text(path: str) -> str:
    return TEMPLATE.format(path=path)


def write_starter(path: Path, force: bool = False) -> None:
    """Write the starter target to ``path``; never overwrites without ``force``."""
    if path.exists() and not force:
        raise UsageProblem(f"{path} already exists; pass --force to overwrite it", value=str(path))
    if not path.parent.exists():
        raise UsageProblem(f"the folder {path.parent} does not exist", value=str(path))
    path.write_text(starter_text(str(path)))
