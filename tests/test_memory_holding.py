"""What a check holds in memory on a large tensor changes no number it computes.

A direction over a large tensor is kept as generator states and drawn again where read; it
must read back bit for bit what one draw of numpy's generator gives (the reference: numpy's
own ``standard_normal`` of the whole length), divided by its norm; that norm is summed a block
at a time (no array of the tensor's size) and agrees with numpy's own to 1e-13 relative (sums
of n squares in another order differ by a few n units of float64's roundoff: common practice). Bitwise comparisons done a chunk at
a time must see a single flipped bit anywhere (IEEE 754: 0.0 and -0.0 differ in the sign bit).
A whole tensor moved for one call is handed to forward without a saved copy, and the
workspace reads back unchanged.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))

from probe_kit import make_probe  # noqa: E402

from gradprobe.common.tensors import SAME_BITS_CHUNK, Workspace, same_bits  # noqa: E402
from gradprobe.engine.directions import check_direction  # noqa: E402
from gradprobe.engine.drawn import DRAW_BLOCK, LAZY_DIRECTION, Direction, unit_direction  # noqa: E402
from gradprobe.engine.evaluate import LossFunction, Perturbation  # noqa: E402
from gradprobe.engine.evaluator import Evaluator  # noqa: E402

SIZE = LAZY_DIRECTION + 3 * DRAW_BLOCK + 1234


def _drawn_at_once(seed: int, size: int, norm: float | None = None) -> tuple[np.ndarray, dict]:
    rng = np.random.default_rng(seed)
    g = rng.standard_normal(size)
    if norm is not None:
        assert abs(norm - np.linalg.norm(g)) <= 1e-13 * norm
    return g / (np.linalg.norm(g) if norm is None else norm), rng.bit_generator.state


def test_a_large_direction_reads_back_the_draw_of_one_call():
    rng = np.random.default_rng(7)
    u = unit_direction(SIZE, rng)
    assert isinstance(u, Direction)
    expected, state_after = _drawn_at_once(7, SIZE, u.norm)
    assert rng.bit_generator.state == state_after  # the next direction draws what it did
    assert np.array_equal(np.asarray(u), expected)
    assert np.isclose(np.linalg.norm(np.asarray(u)), 1.0, rtol=1e-12)  # a unit vector
    for lo, hi in [(0, 5), (DRAW_BLOCK - 3, DRAW_BLOCK + 9), (12345, SIZE), (SIZE - 1, SIZE)]:
        assert np.array_equal(np.asarray(u[lo:hi]), expected[lo:hi])
        blocks = list(u[lo:hi].blocks(1000))
        assert np.array_equal(np.concatenate(blocks), expected[lo:hi])
    picks = np.array([0, DRAW_BLOCK, SIZE - 1, 4242])
    assert np.array_equal(u[picks], expected[picks])


def test_a_small_direction_is_the_array_of_one_call():
    expected, _ = _drawn_at_once(3, 1000)
    u = unit_direction(1000, np.random.default_rng(3))
    assert isinstance(u, np.ndarray) and np.array_equal(u, expected)


def test_a_direction_drawn_again_gives_the_check_of_the_array():
    # loss(w) = sum(w**2) / 2: its gradient is w (power rule, common practice); a wrong
    # analytic gradient of 1.01 w must show along either form of the direction alike.
    w = np.random.default_rng(0).normal(size=SIZE)
    probe = make_probe(lambda v: 0.5 * float(v @ v), w, analytic=1.01 * w)
    u = unit_direction(SIZE, np.random.default_rng(11))
    lazy = check_direction(probe, slice(0, SIZE), u)
    kept = check_direction(probe, slice(0, SIZE), np.asarray(u))
    assert lazy == kept
    assert lazy.significant
    part = slice(DRAW_BLOCK + 17, SIZE - 5)
    assert check_direction(probe, part, u[part.start:part.stop]) == check_direction(
        probe, part, np.asarray(u)[part])


def test_bitwise_equality_a_chunk_at_a_time_sees_one_flipped_bit_anywhere():
    a = np.random.default_rng(1).normal(size=(3 * SAME_BITS_CHUNK) // 8 + 5)
    assert same_bits(a, a.copy())
    for k in (0, SAME_BITS_CHUNK // 8, a.size - 1):
        b = a.copy()
        b.view(np.uint64)[k] ^= np.uint64(1)
        assert not same_bits(a, b)
    assert not same_bits(np.zeros(4), -np.zeros(4))
    nan = np.full(3, np.nan)
    assert same_bits(nan, nan.copy())
    assert not same_bits(a[:6].reshape(2, 3), a[:6].reshape(3, 2))


def test_a_whole_tensor_moved_for_one_call_leaves_the_workspace_as_it_was():
    w = np.linspace(-1.0, 2.0, 5000).reshape(50, 100)
    ws = Workspace({"w": w, "b": np.ones(3)}, {})
    seen = []

    def forward(params, inputs):
        seen.append(params["w"].flags.writeable)
        return float(np.sum(params["w"] ** 2) + np.sum(params["b"]))

    ev = Evaluator(LossFunction(forward, ws, None))
    moved = (w.reshape(-1) * 1.5).copy()
    value = ev.loss_with([Perturbation("w", slice(0, w.size), moved),
                          Perturbation("b", np.array([1]), np.array([4.0]))])
    assert value == float(np.sum((1.5 * w) ** 2) + 1.0 + 4.0 + 1.0)
    assert seen == [False]  # forward cannot write into what it is handed
    assert np.array_equal(ws.owners["w"], w) and np.array_equal(ws.owners["b"], np.ones(3))
    assert ev.count == 1


def test_a_float32_check_that_looks_again_off_its_kinks_still_reports_its_float32_threshold():
    # loss = sum(relu(z) + 0.1 z^2), z = x W: dloss/dW = x^T (1[z > 0] + 0.2 z) (chain rule;
    # relu' = 1 above 0, common practice). Two columns of W are 0, so z is exactly 0 there in
    # every row (kinks): the check looks again at moved points, after letting go of the
    # float64 run's gradients, and must still say the float32 gradient's own threshold,
    # 2 sqrt(u) for float32's unit roundoff u = 2**-24 (the roundoff model's default; the
    # report gives it to two significant digits).
    from gradprobe import probe

    rng = np.random.default_rng(0)
    w = rng.normal(size=(6, 5)).astype(np.float32)
    w[:, :2] = 0.0
    x = rng.normal(size=(4, 6)).astype(np.float32)

    def forward(p, i):
        z = i["x"] @ p["W"]
        return float(np.sum(np.maximum(z, 0) + 0.1 * z**2))

    def backward(p, i):
        z = i["x"] @ p["W"]
        return {"W": i["x"].T @ ((z > 0) + 0.2 * z)}

    report = probe(forward, backward, {"W": w}, {"x": x})
    assert report.ok and report.compute_dtype == "float32"
    assert report.narrow_threshold is not None
    assert abs(report.narrow_threshold - 2 * np.sqrt(2.0**-24)) < 0.01 * 2 * np.sqrt(2.0**-24)


def test_large_private_copies_start_on_an_aligned_boundary_in_the_arrays_own_order():
    # Aligned to 64 bytes, a library sharing host memory through DLPack (JAX on the CPU)
    # takes the engine's arrays without a copy; the numbers and the layout stay the caller's.
    from gradprobe.common.tensors import ALIGNED_FROM, ALIGNMENT

    rng = np.random.default_rng(4)
    c_order = rng.normal(size=(300, 70))  # 168 kB
    f_order = np.asfortranarray(rng.normal(size=(90, 130)).astype(np.float32))  # 47 kB
    small = rng.normal(size=5)
    more = {f"m{k}": rng.normal(size=8200 + 300 * k) for k in range(6)}  # 64 to 80 kB
    ws = Workspace({"c": c_order, "f": f_order, "s": small, **more}, {})
    for name, given in (("c", c_order), ("f", f_order), ("s", small), *more.items()):
        owner = ws.owners[name]
        assert np.array_equal(owner, given) and owner.dtype == given.dtype and owner.shape == given.shape
        assert not np.shares_memory(owner, given)  # private
        assert owner.flags.writeable and not ws.views[name].flags.writeable
        if given.nbytes >= ALIGNED_FROM:
            assert owner.ctypes.data % ALIGNMENT == 0
    assert ws.owners["c"].flags.c_contiguous and ws.owners["f"].flags.f_contiguous
