"""What measuring a float32 gradient's rounding spread holds at once (point.Point.narrow_spread:
the jitter of the narrow backward and the rounding propagated through the float64 run).

Counted by numpy's traced allocations (tracemalloc sees every numpy data buffer), never by
timings; for a numpy target every array the measurement and the target's code make is
numpy's, so the traced peak is all it holds. The spread's values are checked against the same measurement written out on float64
copies (second differences |g(x+3d) - 2 g(x+2d) + g(x+d)| and |g64(x(1 + 2u s)) - g64(x)|, their
definitions in engine/point.py and engine/narrow.py), so holding less changes no number; the
float64 run's gradient is the closed form d tanh(z) = 1 - tanh(z)^2 (standard derivative
table, common practice).
"""

from __future__ import annotations

import tracemalloc

import numpy as np
from framework_kit import need
from test_memory_holding_frameworks import _case, _prepared, forward

torch = need("torch")


def _traced_spread(point):
    """The spread of ``w``, and what numpy held after it and at its peak (tracemalloc)."""
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        spread = point.narrow_spread("w")
        held, peak = (m - before for m in tracemalloc.get_traced_memory())
    finally:
        tracemalloc.stop()
    return spread, held, peak


def test_the_narrow_spread_holds_a_few_float64_copies_of_the_tensor_at_most():
    params, inputs = _case(6000)  # w: 6000 x 40 float32, 0.96 MB
    point = _prepared(params, inputs)
    assert point.numerics.code_dtype == np.float32 and point.numerics.dtype == np.float64
    nbytes = params["w"].numpy().nbytes
    spread, held, peak = _traced_spread(point)
    assert spread is not None and spread.dtype == np.float64 and spread.size == params["w"].numel()
    # Kept: the spread itself, one float64 value per coordinate (2x the float32 tensor).
    assert held / nbytes < 2.5, held / nbytes
    # At once (numpy's part; torch's gradients are its own): the two float64 running maxima
    # (the jitter's, the propagated rounding's) and the last two float32 gradients' copies at
    # most; the float64 point moved in place, the differences a block at a time.
    assert peak / nbytes < 6.5, peak / nbytes


def _numpy_forward(p, i):
    return float(np.sum(np.tanh(i["x"] @ p["w"]) ** 2))


def _numpy_backward(p, i):  # d tanh(z) = 1 - tanh(z)^2 (standard derivative table)
    t = np.tanh(i["x"] @ p["w"])
    return {"w": i["x"].T @ (2 * t * (1 - t * t))}


def _numpy_point(n: int, backward=_numpy_backward):
    from gradprobe.common.tensors import Workspace
    from gradprobe.engine.evaluate import LossFunction
    from gradprobe.engine.evaluator import Evaluator
    from gradprobe.engine.point import prepare

    rng = np.random.default_rng(4)
    params = {"w": (0.2 * rng.standard_normal((n, 40))).astype(np.float32)}
    inputs = {"x": rng.standard_normal((6, n)).astype(np.float32)}
    ws = Workspace(params, inputs)
    point = prepare(_numpy_forward, backward, ws, Evaluator(LossFunction(_numpy_forward, ws, None)), 0)
    assert point.numerics.code_dtype == np.float32 and point.numerics.dtype == np.float64
    return point, params, inputs


def test_a_numpy_target_s_spread_holds_three_float64_tensors_at_once():
    point, params, _ = _numpy_point(25_000)  # w: 25000 x 40 float32, 4 MB
    nbytes = params["w"].nbytes
    spread, held, peak = _traced_spread(point)
    assert spread is not None and spread.dtype == np.float64 and spread.size == params["w"].size
    assert held / nbytes < 2.5, held / nbytes  # the spread, one float64 value per coordinate
    # Everything here is numpy's, the target's own gradients too. At once: the jitter's
    # running maximum (float32 where its values are exact there, as second differences of
    # nearby float32 gradients are: 1x), the propagated rounding's (2x) and the float64
    # gradient the target's code returns (2x), with no moved copy of the float64 params
    # (moved in place, put back from the float32 values) and no whole-size temporary beside
    # them (a block at a time).
    assert peak / nbytes < 5.5, peak / nbytes


def test_the_float64_params_moved_in_place_are_put_back_bit_for_bit_even_when_backward_fails():
    calls = []

    def failing(p, i):  # raises at the propagation's first moved float64 point
        if p["w"].dtype == np.float64:
            calls.append(1)
            if len(calls) > 1:
                raise ValueError("no gradient at this point")
        return _numpy_backward(p, i)

    point, params, inputs = _numpy_point(300, failing)
    wide = point.numerics.workspace.owners
    spread = point.narrow_spread("w")
    assert len(calls) == 2  # the float64 run's own call, then the moved point's
    assert np.array_equal(wide["w"], params["w"].astype(np.float64))
    assert np.array_equal(wide["x"], inputs["x"].astype(np.float64))
    assert point.ws.owners["w"].dtype == np.float32 and np.array_equal(point.ws.owners["w"], params["w"])
    # the jitter of the float32 code, measured, stands alone (no propagated part)
    assert spread is not None and np.array_equal(spread, point._measured_jitter(point.ws, point.numerics.narrow)["w"])


def test_the_narrow_spread_is_the_measurement_written_out():
    params, inputs = _case(40)
    point = _prepared(params, inputs)
    got = point.narrow_spread("w")
    # The jitter, on float64 copies: steps of 4 float32 units at the point's random signs.
    from gradprobe.engine.sampling import tensor_rng
    from gradprobe.engine.narrow import PROPAGATION_SAMPLES, PROPAGATION_UNITS
    from gradprobe.engine.jitter_steps import JITTER_SPAN, JITTER_ULPS

    x, xi32 = params["w"].numpy(), inputs["x"].numpy()  # both differentiated: both move

    def step(name: str, v: np.ndarray) -> np.ndarray:
        signs = tensor_rng(point.seed, name, "jitter").choice([-1.0, 1.0], size=v.shape)
        return JITTER_ULPS * np.spacing(np.abs(v)) * signs

    d, di = step("w", x), step("x", xi32)

    def grad(w: np.ndarray, xi: np.ndarray) -> np.ndarray:
        t = torch.from_numpy(w).requires_grad_(True)
        (g,) = torch.autograd.grad(forward({"w": t}, {"x": torch.from_numpy(xi)}), [t])
        return g.numpy().astype(np.float64).reshape(-1)

    gs = [grad((x + k * d).astype(np.float32), (xi32 + k * di).astype(np.float32))
          for k in range(1, JITTER_SPAN + 1)]
    fuzz = np.max([np.abs(gs[k + 2] - 2.0 * gs[k + 1] + gs[k]) for k in range(JITTER_SPAN - 2)], axis=0)
    # The propagated rounding, on the float64 run: every value moved by 2u at random signs.
    rng = tensor_rng(point.seed, "", "propagation")
    u = float(np.finfo(np.float32).eps) / 2
    x64, i64 = x.astype(np.float64), inputs["x"].numpy().astype(np.float64)
    base = point.numerics.analytic["w"]
    moved = np.zeros_like(base)
    for _ in range(PROPAGATION_SAMPLES):
        w = x64 * (1.0 + PROPAGATION_UNITS * u * rng.choice([-1.0, 1.0], size=x.shape))
        xi = i64 * (1.0 + PROPAGATION_UNITS * u * rng.choice([-1.0, 1.0], size=i64.shape))
        t = torch.from_numpy(w).requires_grad_(True)
        (g,) = torch.autograd.grad(forward({"w": t}, {"x": torch.from_numpy(xi)}), [t])
        moved = np.maximum(moved, np.abs(g.numpy().reshape(-1) - base))
    assert np.array_equal(got, fuzz + moved)


def test_random_signs_are_numpys_own_draws_a_chunk_at_a_time():
    # Against numpy's Generator.choice itself, across chunk edges, and the generator left in
    # the same state (the next tensor's signs are drawn from it too).
    from gradprobe.engine.sampling import SIGN_CHUNK, random_negative, random_signs

    for shape in [(), (1,), (SIGN_CHUNK,), (SIGN_CHUNK + 1,), (3, SIGN_CHUNK // 2 + 5), (0, 4)]:
        ours, theirs = np.random.default_rng(11), np.random.default_rng(11)
        signs = random_signs(ours, shape)
        expected = theirs.choice([-1.0, 1.0], size=shape)
        assert signs.shape == np.shape(expected) and np.array_equal(signs, expected)
        assert ours.random() == theirs.random()
        assert np.array_equal(random_negative(np.random.default_rng(3), shape),
                              np.random.default_rng(3).choice([-1.0, 1.0], size=shape) < 0)


def test_second_differences_are_kept_in_float32_where_exact_and_read_back_as_written_out():
    # Against the definition written out on float64 copies: max_k |g_k - 2 g_(k-1) + g_(k-2)|.
    from gradprobe.engine.jitter_steps import Narrowed, add_into, largest_second_difference, widened

    rng = np.random.default_rng(5)
    size = 3 * (1 << 16) + 7  # several blocks and a part of one
    near = (1.0 + 1e-6 * rng.standard_normal((4, size))).astype(np.float32)  # nearby gradients
    # Far apart (1e6 - 2 + 1.2e-3): second differences that need more than float32's 24 bits
    few, many = near.copy(), near.copy()
    few[2, [5, 70_000, size - 3]], few[0, [5, 70_000, size - 3]] = 1e6, 1.2345678e-3
    many[2, ::3], many[0, ::3] = 1e6, 1.2345678e-3  # a third of them: float64 from there on
    for rows, kept in ((near, Narrowed), (few, Narrowed), (many, np.ndarray)):
        wide = rows.astype(np.float64)
        expected = np.maximum(np.abs(wide[2] - 2.0 * wide[1] + wide[0]), np.abs(wide[3] - 2.0 * wide[2] + wide[1]))
        most = largest_second_difference(None, rows[2], rows[1], rows[0], compact=True)
        most = largest_second_difference(most, rows[3], rows[2], rows[1], compact=True)
        assert isinstance(most, kept) and np.array_equal(widened(most), expected)
        base = rng.standard_normal(size)
        total = base.copy()
        add_into(total, most)
        assert np.array_equal(total, base + expected)
        plain = largest_second_difference(largest_second_difference(None, rows[2], rows[1], rows[0]),
                                          rows[3], rows[2], rows[1])
        assert plain.dtype == np.float64 and np.array_equal(plain, expected)
    assert largest_second_difference(None, few[2], few[1], few[0], compact=True).at.size == 3


def _two_forward(p, i):
    return float(np.sum(np.tanh(i["x"] @ p["w"] + p["v"]) ** 2))


def _two_backward(p, i):  # d tanh(z) = 1 - tanh(z)^2 (standard derivative table)
    t = np.tanh(i["x"] @ p["w"] + p["v"])
    d = 2 * t * (1 - t * t)
    return {"w": i["x"].T @ d, "v": d.sum(axis=0)}


def _two_point(n: int):
    from gradprobe.common.tensors import Workspace
    from gradprobe.engine.evaluate import LossFunction
    from gradprobe.engine.evaluator import Evaluator
    from gradprobe.engine.point import prepare

    rng = np.random.default_rng(8)
    params = {"w": (0.2 * rng.standard_normal((n, 40))).astype(np.float32),
              "v": (0.1 * rng.standard_normal(40)).astype(np.float32)}
    inputs = {"x": rng.standard_normal((6, n)).astype(np.float32)}
    ws = Workspace(params, inputs)
    point = prepare(_two_forward, _two_backward, ws, Evaluator(LossFunction(_two_forward, ws, None)), 0)
    assert point.numerics.code_dtype == np.float32 and point.numerics.dtype == np.float64
    return point, params


def test_a_tensor_checked_before_the_spread_is_measured_is_not_held_and_no_spread_changes():
    # Every tensor moves in every call either way; the spreads kept are those of the tensor
    # asking and the ones not probed yet. The numbers against the spreads of a point that
    # keeps every tensor's (itself checked against the definition written out above).
    everything, params = _two_point(25_000)  # w: 25000 x 40 float32, 4 MB; v: 40
    full = {name: everything.narrow_spread(name) for name in ("v", "w")}
    point, _ = _two_point(25_000)
    point.probe("w", 1e-3)  # w is checked first
    spread, held, peak = _traced_spread_of(point, "v")
    nbytes = params["w"].nbytes
    assert np.array_equal(spread, full["v"])
    assert held / nbytes < 0.1, held / nbytes  # w's spread is not kept
    # At once: w moved (1x, float32) and its float32 gradient (1x), then its float64
    # gradient (2x): no running maximum of w's size (5.3x while w's is kept).
    assert peak / nbytes < 3.0, peak / nbytes
    assert np.array_equal(point.narrow_spread("w"), full["w"])  # asked after all: measured then


def _traced_spread_of(point, name):
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        spread = point.narrow_spread(name)
        held, peak = (m - before for m in tracemalloc.get_traced_memory())
    finally:
        tracemalloc.stop()
    return spread, held, peak
