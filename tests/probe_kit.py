"""Building a tensor probe over a plain function of one vector, for the engine's unit tests."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from gradprobe.engine.evaluate import LossFunction
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.probe import TensorProbe
from gradprobe.common.tensors import Workspace


def make_probe(
    loss: Callable[[np.ndarray], float], points: np.ndarray, analytic: np.ndarray | None = None,
    threshold: float = 1e-6,
) -> TensorProbe:
    """A probe of tensor ``w`` at ``points`` for ``loss(w)``; analytic defaults to zeros."""
    ws = Workspace({"w": np.array(points, dtype=float)}, {})
    ev = Evaluator(LossFunction(lambda p, i: float(loss(p["w"])), ws, None))
    f0 = ev.base()
    a = np.zeros(ws.owners["w"].size) if analytic is None else np.asarray(analytic, dtype=float)
    return TensorProbe(ev, "w", ws.owners["w"].reshape(-1), a, f0, np.dtype(np.float64), threshold)
