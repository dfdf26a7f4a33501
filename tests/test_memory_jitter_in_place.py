"""The jitter of a narrow target's backward (how its rounding varies between nearby points) is
measured with the moved points written into the workspace's own arrays and put back from the
float64 run's copy: the same values as on moved copies, with no moved copy of the params.

Counted by numpy's traced allocations, never by timings. Every float32 value is exact in
float64 (IEEE 754 binary32 is a subset of binary64: common practice), so the arrays must come
back bit for bit. The gradient of sum(tanh(X W)^2) is 2 X^T (tanh(X W) (1 - tanh(X W)^2))
(chain rule with d tanh = 1 - tanh^2, a standard table entry).
"""

from __future__ import annotations

import tracemalloc

import numpy as np
from memory_kit import traced_peak

from gradprobe.common.tensors import Workspace, aligned_copy
from gradprobe.engine.jitter_steps import measured_jitter, move_in_place, moved_point
from gradprobe.engine.sampling import tensor_rng


def forward(p, i):
    return float(np.sum(np.tanh(i["x"] @ p["w"]) ** 2))


def backward(p, i):
    t = np.tanh(i["x"] @ p["w"])
    return {"w": 2 * i["x"].T @ (t * (1 - t * t))}


def _case(n: int):
    g = np.random.default_rng(3)
    w = (0.2 * g.standard_normal((n, 16))).astype(np.float32)
    x = g.standard_normal((3, n)).astype(np.float32)
    ws = Workspace({"w": w}, {"x": x})
    wide = ws.replacing({name: aligned_copy(a, np.float64) for name, a in ws.owners.items()})
    return w, ws, wide



def test_a_point_moved_in_place_has_the_values_of_the_moved_copy():
    g = np.random.default_rng(8)
    x = np.concatenate([g.standard_normal(200_000).astype(np.float32),  # several sign chunks
                        np.array([0.0, -0.0, 1e-40, np.float32(3e38)], dtype=np.float32)])
    for k in (1, 5):
        for grid in (None, np.dtype(np.float16)):
            with np.errstate(over="ignore", invalid="ignore"):  # 3e38 is beyond float16's grid
                copy = moved_point(x, k, 4.0, tensor_rng(1, "w", "jitter"), grid)
                inside = x.copy()
                move_in_place(inside, k, 4.0, tensor_rng(1, "w", "jitter"), grid)
            assert np.array_equal(copy.view(np.uint32), inside.view(np.uint32))  # bit for bit
            assert not np.array_equal(inside, x)


def test_the_jitter_measured_in_place_is_the_one_measured_on_copies_with_no_moved_copy():
    w, ws, wide = _case(20_000)  # 1.3 MB of float32 params
    base = {"w": backward(ws.params_tree, ws.inputs_tree)["w"].reshape(-1)}
    exact = 2 * ws.owners["x"].astype(np.float64).T @ (
        np.tanh(ws.owners["x"].astype(np.float64) @ w.astype(np.float64))
        * (1 - np.tanh(ws.owners["x"].astype(np.float64) @ w.astype(np.float64)) ** 2))
    assert np.max(np.abs(base["w"].reshape(exact.shape) - exact)) <= 1e-4 * np.max(np.abs(exact))
    held: list[int] = []  # what is traced when backward is entered, at each moved point

    def seen(p, i):
        held.append(tracemalloc.get_traced_memory()[0])
        return backward(p, i)

    _, on_copies = traced_peak(lambda: measured_jitter(seen, None, ws, base, 0))
    copies, held[:] = max(held), []
    _, in_place = traced_peak(lambda: measured_jitter(seen, None, ws, base, 0, source=wide))
    assert np.array_equal(on_copies["w"], in_place["w"])  # the same values, bit for bit
    assert np.array_equal(ws.owners["w"], w)  # put back exactly
    assert np.array_equal(wide.owners["w"], w.astype(np.float64))
    assert max(held) <= copies - 0.9 * w.nbytes, (copies / w.nbytes, max(held) / w.nbytes)  # no moved copy


def test_the_float64_run_measured_in_place_is_put_back_from_the_narrow_values():
    w, ws, wide = _case(5_000)
    base = {"w": backward(wide.params_tree, wide.inputs_tree)["w"].reshape(-1)}
    on_copies = measured_jitter(backward, None, wide, base, 0, grid=np.dtype(np.float32))
    in_place = measured_jitter(backward, None, wide, base, 0, grid=np.dtype(np.float32), source=ws)
    assert np.array_equal(on_copies["w"], in_place["w"])
    assert np.array_equal(wide.owners["w"], w.astype(np.float64))
    assert np.array_equal(ws.owners["w"], w)
