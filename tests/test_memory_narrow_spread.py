"""What measuring a float32 gradient's rounding spread holds at once (point.Point.narrow_spread:
the jitter of the narrow backward and the rounding propagated through the float64 run).

Counted by numpy's traced allocations (tracemalloc sees every numpy data buffer), never by
timings. The spread's values are checked against the same measurement written out on float64
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


def test_the_narrow_spread_holds_a_few_float64_copies_of_the_tensor_at_most():
    params, inputs = _case(6000)  # w: 6000 x 40 float32, 0.96 MB
    point = _prepared(params, inputs)
    assert point.numerics.code_dtype == np.float32 and point.numerics.dtype == np.float64
    nbytes = params["w"].numpy().nbytes
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        spread = point.narrow_spread("w")
        held, peak = (m - before for m in tracemalloc.get_traced_memory())
    finally:
        tracemalloc.stop()
    assert spread is not None and spread.dtype == np.float64 and spread.size == params["w"].numel()
    # Kept: the spread itself, one float64 value per coordinate (2x the float32 tensor).
    assert held / nbytes < 2.5, held / nbytes
    # At once: the spread, the last two float32 gradients, a moved float64 point and its
    # float64 gradient, and one difference; never several full-size temporaries per step.
    assert peak / nbytes < 9.0, peak / nbytes


def test_the_narrow_spread_is_the_measurement_written_out():
    params, inputs = _case(40)
    point = _prepared(params, inputs)
    got = point.narrow_spread("w")
    # The jitter, on float64 copies: steps of 4 float32 units at the point's random signs.
    from gradprobe.engine.sampling import tensor_rng
    from gradprobe.engine.narrow import PROPAGATION_SAMPLES, PROPAGATION_UNITS
    from gradprobe.engine.point import JITTER_SPAN, JITTER_ULPS

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
