"""Directions over a large tensor of float32 code judged on its own arithmetic (no float64
run): wider and jittered ladders resolve what rounding hid at the first steps.

The target: the hidden weights (30,000) of a tanh regression of sensor readings, computed
in float32 with its loss cast to float32 (bench/large_models.py's ``Sensors``), the other
layers held as inputs. Its gradient is the closed form that tests/test_large_models.py
checks against mpmath's high-precision differentiation (the same formulas in float64);
here it is taken in float64 from the float32 values, so a correct gradient's directional
discrepancy is 0 to far below float32's rounding.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))

from large_models import Demand, Sensors  # noqa: E402

from gradprobe import probe  # noqa: E402
from gradprobe.common.tensors import Workspace  # noqa: E402
from gradprobe.engine.directions import check_direction
from gradprobe.engine.drawn import unit_direction  # noqa: E402
from gradprobe.engine.evaluate import LossFunction  # noqa: E402
from gradprobe.engine.evaluator import Evaluator  # noqa: E402
from gradprobe.engine.probe import TensorProbe  # noqa: E402

NET = Sensors((30, 1000, 4), seed=0, cast=True)  # more than are swept whole (20,000)
W = NET.params["hidden"]["W"]
HELD = {**NET.inputs, "b": NET.params["hidden"]["b"], "V": NET.params["out"]["W"], "c": NET.params["out"]["b"]}
THRESHOLD = 4.9e-4  # float32's default (gradprobe.common.roundoff.default_threshold)


def _params(p, i):
    return {"hidden": {"W": p["W"], "b": i["b"]}, "out": {"W": i["V"], "b": i["c"]}}


def forward(p, i):
    return NET.forward(_params(p, i), i)


def exact(w: np.ndarray) -> np.ndarray:
    """The closed form in float64 at the float32 values."""
    p = _params({"W": w}, HELD)
    wide = {layer: {k: np.asarray(v, dtype=np.float64) for k, v in t.items()} for layer, t in p.items()}
    return Demand.exact(NET, wide, {k: np.asarray(v, dtype=np.float64) for k, v in HELD.items()})["hidden"]["W"]


def backward(p, i, wrong: tuple[int, float] | None = None):
    g = NET.exact(_params(p, i), i)["hidden"]["W"].copy()
    if wrong is not None:
        g.reshape(-1)[wrong[0]] *= 1.0 + wrong[1]
    return {"W": g}


def _float32_probe(analytic: np.ndarray) -> TensorProbe:
    ws = Workspace({"W": W.copy()}, {})
    ev = Evaluator(LossFunction(lambda p, i: float(forward(p, HELD)), ws, None))
    return TensorProbe(ev, "W", ws.owners["W"].reshape(-1), analytic.reshape(-1), ev.base(),
                       np.dtype(np.float32), THRESHOLD)


@pytest.mark.parametrize("seed", [0, 1])
def test_a_float32_direction_bound_holds_and_resolves_one_element_twenty_percent_off(seed):
    """Correct gradient: the bound covers the true discrepancy, 0 (no false alarm), and is
    tight enough that one typical element 20% off, at a typical weight 1/sqrt(n), shows."""
    pr = _float32_probe(exact(W))
    u = unit_direction(W.size, np.random.default_rng(seed))
    check = check_direction(pr, slice(0, W.size), u, threshold=True)
    assert not check.kink and abs(check.discrepancy) <= 4.0 * check.error and not check.significant
    assert 4.0 * check.error <= 0.2 * pr.grad_scale / W.size ** 0.5, check


def test_a_float32_direction_shows_one_element_twenty_percent_off():
    a = exact(W).reshape(-1)
    u = np.asarray(unit_direction(W.size, np.random.default_rng(2)))
    k = int(np.argsort(-np.abs(a * u))[10])  # an element this direction weighs, not the most
    wrong = a.copy()
    wrong[k] *= 1.2
    truth = -0.2 * a[k] * u[k]  # (numeric - analytic) . u
    check = check_direction(_float32_probe(wrong), slice(0, W.size), u, threshold=True)
    assert abs(check.discrepancy - truth) <= 4.0 * check.error
    assert check.significant, check


@pytest.mark.parametrize("seed", [0, 1])
def test_one_weight_twenty_percent_off_is_failed_and_located(seed):
    a = exact(W).reshape(-1)
    k = int(np.argsort(-np.abs(a))[W.size // 4])  # a typical element, not the largest
    report = probe(forward, lambda p, i: backward(p, i, (k, 0.2)), {"W": W}, HELD, seed=seed)
    t = report.tensor("W")
    index = tuple(int(v) for v in np.unravel_index(k, W.shape))
    assert t.status == "fail" and index in t.bad_indices, (t.status, t.inconclusive_reason)
