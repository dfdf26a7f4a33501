"""What the float64 run of narrow code holds at once: its looks for a narrower type and its
moves along a direction are made in the float64 copies themselves and put back exactly
from the narrow code's own values.

Counted by numpy's traced allocations (tracemalloc sees every numpy data buffer), never by
timings. Every float32 value is exact in float64 (IEEE 754 binary32 is a subset of binary64:
common practice), so the float64 copies must come back bit for bit. The loss along a
direction is checked against the closed form sum((x (w + c u))^2), evaluated in float64.
"""

from __future__ import annotations


import numpy as np
from memory_kit import traced_peak
from framework_kit import need

from gradprobe.common.tensors import Workspace
from gradprobe.engine.drawn import unit_direction
from gradprobe.engine.evaluate import LossFunction
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.gradients import validate
from gradprobe.engine.point import prepare
from gradprobe.engine.precision import CHUNK, _moved, narrower_compute_type
from gradprobe.targets.frameworks import frame
from gradprobe.targets.target import Target

torch = need("torch")


def forward(p, i):
    return ((i["x"] @ p["w"]) ** 2).sum()


def backward(p, i):
    z = i["x"] @ p["w"]
    return {"w": 2 * i["x"].T @ z}


def _case(n: int) -> tuple[dict, dict]:
    g = torch.Generator().manual_seed(7)
    return ({"w": 0.1 * torch.randn(n, 40, generator=g)}, {"x": torch.randn(4, n, generator=g)})


def _point(params: dict, inputs: dict):
    target, _ = frame(Target("sensor drift", forward, backward, params, inputs))
    ws = Workspace(target.params, target.inputs)
    return prepare(target.forward, target.backward, ws, Evaluator(LossFunction(target.forward, ws, None)), 0)



def test_the_float64_run_looks_for_a_narrower_type_in_its_own_copies():
    params, inputs = _case(10000)  # 400k float32 params: 3.2 MB in float64
    point = _point(params, inputs)
    n = point.numerics
    assert n.dtype == np.float64 and n.code_dtype == np.float32
    wide, narrow = n.workspace, point.ws
    before = wide.owners["w"].copy()
    f64 = point.evaluator.base()
    wide_bytes = wide.owners["w"].nbytes
    # 11 looks at moved params (float32 and 16-bit grids); a moved copy would be the float64
    # params' size each (two while it is made).
    peak, found = traced_peak(lambda: narrower_compute_type(point.evaluator, wide, f64, np.dtype(np.float64),
                                                      source=narrow))
    assert found is None  # the float64 run computes in float64
    assert peak < 0.5 * wide_bytes, peak / wide_bytes
    assert np.array_equal(wide.owners["w"], before)  # put back bit for bit
    assert np.array_equal(wide.owners["w"], narrow.owners["w"].astype(np.float64))


def test_moves_made_a_chunk_at_a_time_are_the_moves_made_at_once():
    rng = np.random.default_rng(3)
    size = 2 * CHUNK + 777  # several chunks, the last one odd
    w = rng.standard_normal(size).astype(np.float32)
    ws = Workspace({"w": w}, {})
    for relative, signs in ((0.0, None), (2.0**-12, None), (0.875 * 2.0**-12, 5)):
        draws = None if signs is None else np.random.default_rng(signs)
        (p,) = _moved(ws, ["w"], relative, np.dtype(np.float16), draws)
        # the same moves for the whole tensor at once, as one expression
        whole = w.astype(np.float16).astype(np.float64)
        if signs is None:
            whole *= 1.0 + relative
        else:
            whole *= 1.0 + relative * np.random.default_rng(signs).choice([-1.0, 1.0], size=size)
        assert p.values.dtype == np.float32
        assert np.array_equal(p.values, whole.astype(np.float32))


def test_a_whole_tensor_moved_along_a_direction_is_moved_in_place_and_put_back():
    params, inputs = _case(10000)
    point = _point(params, inputs)
    probe = point.probe("w", 1e-6)
    assert probe.narrow is not None
    size = probe.size
    u = unit_direction(size, np.random.default_rng(1))
    x = probe.x.copy()
    scales = np.array([1e-3, -1e-3])
    peak, (values, predicted) = traced_peak(lambda: probe.along(slice(0, size), u, scales))
    assert peak < x.nbytes, peak / x.nbytes  # a moved copy alone would be x's size
    assert np.array_equal(probe.x, x)  # put back bit for bit
    assert np.array_equal(point.numerics.workspace.owners["w"].reshape(-1), x)
    # The loss along the direction: sum((X (W + c U))^2) in float64.
    X = inputs["x"].double().numpy()
    for c, value, change in zip(scales, values, predicted):
        moved = (x + c * np.asarray(u)).reshape(10000, 40)
        exact = float(((X @ moved) ** 2).sum())
        assert abs(value - exact) <= 1e-12 * abs(exact)
        analytic = float(probe.a[:] @ ((x + c * np.asarray(u)) - x))
        assert abs(change - analytic) <= 1e-12 * max(abs(analytic), 1e-300) + 1e-12 * abs(value)



def test_a_gradient_the_reverse_mode_made_is_kept_without_a_second_copy():
    # forward only: the gradient is torch's reverse mode, 2 X^T (X W) for sum((X W)^2)
    # (matrix calculus, d tr(A^T A) = 2 A^T dA: common practice).
    params, inputs = _case(10000)
    params = {"w": params["w"].double()}
    inputs = {"x": inputs["x"].double()}
    target, _ = frame(Target("sensor drift", forward, None, params, inputs))
    ws = Workspace(target.params, target.inputs)
    raw = target.backward(ws.params_tree, ws.inputs_tree)
    nbytes = ws.owners["w"].nbytes
    peak, grads = traced_peak(lambda: validate(raw, ws))
    assert peak < 0.5 * nbytes, peak / nbytes  # a copy would be the gradient's size
    X, W = inputs["x"].numpy(), params["w"].numpy()
    exact = 2 * X.T @ (X @ W)
    assert np.max(np.abs(grads.values["w"] - exact)) <= 1e-12 * np.max(np.abs(exact))
    # A gradient the user's own backward returned is still copied (the user may hold it).
    mine, _ = frame(Target("sensor drift", forward, backward, params, inputs))
    handed = mine.backward(ws.params_tree, ws.inputs_tree)
    kept = handed["w"]
    again = validate(handed, ws).values["w"]
    assert not np.shares_memory(again, kept)
