"""What a check of a framework target holds at once: no copy is kept past its use.

Counted by references and by numpy's traced allocations (tracemalloc sees every numpy data
buffer), never by timings. The numbers a check computes stay those of the code: a float32
gradient is kept in float32 (every binary32 value is exact in binary64, IEEE 754: common
practice), and the float64 run's gradient matches the closed form d tanh(z) = 1 - tanh(z)^2
(standard derivative table, common practice).
"""

from __future__ import annotations

import gc
import tracemalloc
import weakref

import numpy as np
from framework_kit import need, rel_gap

from gradprobe.common.tensors import Handed, Workspace
from gradprobe.engine.evaluate import LossFunction, Perturbation
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.gradients import validate
from gradprobe.engine.point import prepare
from gradprobe.engine.widened import Widened
from gradprobe.targets.frameworks import frame
from gradprobe.targets.target import Target

torch = need("torch")


class Squash(torch.autograd.Function):
    """tanh with a hand-written backward."""

    @staticmethod
    def forward(ctx, z):
        t = torch.tanh(z)
        ctx.save_for_backward(t)
        return t

    @staticmethod
    def backward(ctx, g):
        (t,) = ctx.saved_tensors
        return g * (1 - t * t)


def forward(p, i):
    return (Squash.apply(i["x"] @ p["w"]) ** 2).sum()


def _case(n: int = 300) -> tuple[dict, dict]:
    g = torch.Generator().manual_seed(4)
    return ({"w": 0.2 * torch.randn(n, 40, generator=g)},
            {"x": torch.randn(6, n, generator=g)})


def _prepared(params: dict, inputs: dict):
    target, _ = frame(Target("squash", forward, None, params, inputs))
    ws = Workspace(target.params, target.inputs)
    return prepare(target.forward, target.backward, ws, Evaluator(LossFunction(target.forward, ws, None)), 0)


def test_a_float32_gradient_is_kept_in_float32_beside_the_float64_run():
    params, inputs = _case()
    point = _prepared(params, inputs)
    n = point.numerics
    assert n.dtype == np.float64 and n.code_dtype == np.float32  # judged on its float64 run
    narrow, wide = n.narrow["w"], n.analytic["w"]
    assert narrow.dtype == np.float32 and wide.dtype == np.float64
    # The narrow gradient is the code's own float32 result, bit for bit.
    w = params["w"].clone().requires_grad_(True)
    (own,) = torch.autograd.grad(forward({"w": w}, inputs), [w])
    assert np.array_equal(narrow, own.numpy().reshape(-1))
    # The float64 run's gradient is the closed form, x^T (2 t (1 - t^2)), t = tanh(x w).
    x, w64 = inputs["x"].double().numpy(), params["w"].double().numpy()
    t = np.tanh(x @ w64)
    assert rel_gap(wide, (x.T @ (2 * t * (1 - t * t))).reshape(-1)) < 1e-12
    # The float64 workspace holds the caller's float32 values exactly.
    assert np.array_equal(n.workspace.owners["w"], params["w"].numpy().astype(np.float64))
    # The narrow probe reads the float32 gradient as float64, exactly.
    probe = point.probe("w", 1e-6).narrow
    assert probe is not None and isinstance(probe.a, Widened)
    picks = np.array([0, 7, narrow.size - 1])
    assert probe.a[picks].dtype == np.float64
    assert np.array_equal(probe.a[picks], narrow[picks].astype(np.float64))


def test_preparing_a_float32_target_holds_no_second_float64_copy():
    # Traced numpy buffers while the point is prepared, in units of the float32 tensors'
    # bytes (w and x: both are differentiated): the engine's float32 copies (1), the float32
    # gradients (1), the float64 run's copies (2) and gradients (2) must exist; a second float64 copy of the params, scratch
    # copies for the float64 backward, or the float32 gradient widened to float64 would
    # each add 2 more.
    params, inputs = _case(3000)
    _prepared(params, inputs)  # warm up: imports and caches are not the check's
    nbytes = params["w"].numpy().nbytes + inputs["x"].numpy().nbytes
    gc.collect()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        point = _prepared(params, inputs)
        held, peak = (m - before for m in tracemalloc.get_traced_memory())
    finally:
        tracemalloc.stop()
    assert held / nbytes < 6.5, held / nbytes
    assert peak / nbytes < 8.5, peak / nbytes
    assert point.numerics.narrow["w"].dtype == np.float32


def test_a_moved_copy_handed_to_a_torch_forward_is_let_go_of_after_its_call():
    params, inputs = _case()
    target, _ = frame(Target("squash", forward, None, params, inputs))
    ws = Workspace(target.params, target.inputs)
    ev = Evaluator(LossFunction(target.forward, ws, None))
    ev.base()
    ev.base()
    assert target.forward._last[0] is ws.params_tree  # the workspace's own trees stay built
    moved = ws.owners["w"].reshape(-1) * 1.5
    gone = weakref.ref(moved)
    value = ev.loss_with([Perturbation("w", slice(0, moved.size), moved)])
    expected = float((Squash.apply(inputs["x"] @ (1.5 * params["w"])) ** 2).sum())
    assert abs(value - expected) <= 1e-5 * abs(expected)  # float32 sums in another order
    del moved
    gc.collect()
    assert gone() is None  # not held by the boundary's kept trees


def test_gradients_the_boundary_built_are_let_go_of_as_they_are_read():
    ws = Workspace({"layer": {"w": np.ones((3, 2)), "b": np.zeros(2)}}, {})
    built = np.full((3, 2), 0.5)
    gone = weakref.ref(built)
    handed = Handed(layer={"w": built, "b": np.ones(2)})
    del built
    grads = validate(handed, ws)
    gc.collect()
    assert gone() is None and handed == {}  # the float64 copy only is held
    assert np.array_equal(grads.values["layer.w"], np.full((3, 2), 0.5))
    # A mapping the user's own code returned is read as it is and left unchanged.
    mine = {"layer": {"w": np.full((3, 2), 0.25), "b": np.ones(2)}}
    again = validate(mine, ws)
    assert set(mine["layer"]) == {"w", "b"} and np.array_equal(mine["layer"]["w"], np.full((3, 2), 0.25))
    assert again.values["layer.w"] is not mine["layer"]["w"]  # a private copy
