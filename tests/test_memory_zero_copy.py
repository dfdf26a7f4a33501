"""What a check of a JAX target copies: the engine's arrays reach the user's JAX code on the
engine's own memory (DLPack, zero-copy on the CPU), so no copy of the params is made per call.

Counted by memory shared (numpy's ``shares_memory``) and by numpy's traced allocations, never
by timings. A gradient the user's backward hands back on the memory it was given (the loss
0.5 sum(w^2), whose gradient is w itself: power rule, common practice) must still be judged
right: the engine moves its own arrays afterwards, so such a gradient is copied first.
"""

from __future__ import annotations

import gc
import tracemalloc

import numpy as np
from framework_kit import need

from gradprobe.api import probe
from gradprobe.common.tensors import ALIGNMENT, Workspace
from gradprobe.engine.drawn import Direction, unit_direction
from gradprobe.engine.evaluate import LossFunction
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.point import prepare
from gradprobe.targets.frameworks import frame
from gradprobe.targets.target import Target

jax = need("jax")
jnp = need("jax.numpy")


def _seen_by(forward_dtype, n: int = 120):
    """A JAX target whose forward keeps the arrays it is handed; its workspace and point."""
    seen: list = []

    def forward(p, i):
        seen.append(p["w"])
        return jnp.sum(jnp.tanh(i["x"] @ p["w"]) ** 2)

    g = np.random.default_rng(5)
    w = (0.3 * g.standard_normal((n, 80))).astype(forward_dtype)  # 38 kB (float32) or more
    x = g.standard_normal((3, n)).astype(forward_dtype)
    with jax.enable_x64(forward_dtype == np.float64):
        params, inputs = {"w": jnp.asarray(w)}, {"x": jnp.asarray(x)}
    target, _ = frame(Target("crop yields", forward, None, params, inputs))
    ws = Workspace(target.params, target.inputs)
    point = prepare(target.forward, target.backward, ws, Evaluator(LossFunction(target.forward, ws, None)), 0)
    return seen, point, w, target.forward


def _handed_at_base(seen: list, forward, ws: Workspace) -> np.ndarray:
    """What forward is handed for the loss at the workspace's own values, as numpy."""
    seen.clear()
    LossFunction(forward, ws, None).base()
    (handed,) = _concrete(seen)
    return np.from_dlpack(handed)


def _concrete(seen: list) -> list:
    """The arrays forward was handed for a value (not JAX's tracers of its reverse mode)."""
    return [a for a in seen if isinstance(a, jax.Array) and not isinstance(a, jax.core.Tracer)]


def test_a_jax_forward_reads_the_engines_own_arrays_without_a_copy():
    seen, point, w, forward = _seen_by(np.float64, n=200)  # 128 kB of float64 params
    owner = point.ws.owners["w"]
    assert owner.ctypes.data % ALIGNMENT == 0
    assert np.shares_memory(_handed_at_base(seen, forward, point.ws), owner)
    assert np.array_equal(owner, w)  # the caller's values, unchanged


def test_a_float32_jax_target_and_its_float64_run_share_the_engines_arrays():
    seen, point, w, forward = _seen_by(np.float32, n=240)  # 77 kB of float32 params, 154 kB in float64
    n = point.numerics
    assert n.dtype == np.float64 and n.code_dtype == np.float32  # judged on its float64 run
    narrow, wide = point.ws.owners["w"], n.workspace.owners["w"]
    handed = _handed_at_base(seen, forward, point.ws)
    assert handed.dtype == np.float32 and np.shares_memory(handed, narrow)
    handed = _handed_at_base(seen, forward, n.workspace)
    assert handed.dtype == np.float64 and np.shares_memory(handed, wide)
    assert np.array_equal(wide, w.astype(np.float64))  # every float32 value exact in float64


def _own_input_as_gradient(library: str):
    """0.5 sum(w^2) with the backward returning the very array it was handed as w."""
    w = np.random.default_rng(8).normal(size=(100, 100))  # 80 kB: shared without a copy
    if library == "jax":
        with jax.enable_x64(True):
            params = {"w": jnp.asarray(w)}
        return (lambda p, i: 0.5 * jnp.sum(p["w"] ** 2)), (lambda p, i: {"w": p["w"]}), params, w
    torch = need("torch")
    return (lambda p, i: 0.5 * (p["w"] ** 2).sum()), (lambda p, i: {"w": p["w"]}), {"w": torch.from_numpy(w.copy())}, w


def test_a_gradient_handed_back_on_the_memory_it_was_given_is_judged_right():
    for library in ("jax", "torch"):
        forward, backward, params, w = _own_input_as_gradient(library)
        report = probe(forward, backward, params, {}, label="shop demand", sample=40, directions=2)
        assert report.ok, (library, [t.status for t in report.tensors])
        assert np.array_equal(np.asarray(params["w"]), w)  # the caller's array, unchanged


def test_a_large_direction_is_drawn_without_an_array_of_its_size():
    size = 1 << 22  # 32 MB of float64
    rng = np.random.default_rng(2)
    gc.collect()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        u = unit_direction(size, rng)
        peak = tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()
    assert isinstance(u, Direction)
    assert peak < 0.05 * 8 * size, peak  # one block of draws, not the whole direction
    # still a unit vector (the norm summed a block at a time)
    assert abs(np.linalg.norm(np.asarray(u)) - 1.0) < 1e-12
