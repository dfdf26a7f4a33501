"""A narrow gradient that leaves its float64 run is put down to a kink only on a kink's
evidence: one-sided quotients whose gap keeps its size as the step shrinks.

Facts used (Taylor's theorem, common practice): for a smooth f the right and left quotients
at step h are f' +- f'' h / 2 + f''' h**2 / 6 +- f'''' h**3 / 24 + ..., so their gap is
f'' h + f'''' h**3 / 12 + ...: it shrinks with the step (like h, or like h**3 where f'' = 0).
For (w - c)**2 the gap is exactly 2 h, for (w - c)**4 at w = c exactly 2 h**3. Across a kink
of |w - c| (c within the step) it stays near the jump, 2.
"""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe.api import probe
from gradprobe.engine.narrow import kink_within_reach
from gradprobe.engine.probe import TensorProbe
from probe_kit import make_probe

ml_dtypes = pytest.importorskip("ml_dtypes")
BF16 = np.dtype(ml_dtypes.bfloat16)
THRESHOLD = 0.12  # bfloat16's default threshold (2 sqrt(u), u = 2**-8)


def _judge(loss, point: float, exact: float, narrow: float):
    """kink_within_reach for one coordinate at ``point`` (a bfloat16 value), the float64 run's
    gradient ``exact`` and a narrow gradient ``narrow``."""
    probe = make_probe(loss, [point], [exact])
    own = TensorProbe(probe.evaluator, "w", np.array([point]).astype(BF16), np.array([narrow]), probe.f0,
                      BF16, THRESHOLD)
    assert own.prior_steps(np.array([0]))[0] == 0.25  # bfloat16: eps**(1/3) * |w| to a power of 2
    flat = np.array([0])
    scale = np.array([abs(exact)])
    return kink_within_reach(probe, own, flat, np.array([narrow]), scale)


def test_curvature_is_not_taken_for_a_kink():
    """50 (w - 0.999)**2 at w = 1: f' = 0.1, f'' = 100. At the smallest steps a kink would be
    looked for at (2**-10), the one-sided quotients are f' -+ 0.049, further apart than the
    threshold's 0.012; a narrow value between them (0.13) is not explained by a kink: their
    gap quarters as the step does (it is exactly 100 h)."""
    assert _judge(lambda w: 50.0 * (w[0] - 0.999) ** 2, 1.0, 0.1, 0.13) is None


def test_a_fourth_order_bend_is_not_taken_for_a_kink():
    """10 (w - 1)**4 + w at w = 1: f'' = 0, the gap is 20 h**3 (0.31 at the first step 0.25,
    beyond the threshold's 0.12): it shrinks 64-fold as the step quarters."""
    assert _judge(lambda w: 10.0 * (w[0] - 1.0) ** 4 + w[0], 1.0, 1.0, 1.2) is None


@pytest.mark.parametrize("offset", [0.0, 1e-6, 3e-4, 2e-3, -2e-3, 7e-3, -0.0125, -0.02])
def test_a_kink_within_the_narrow_types_reach_is_one(offset):
    """|w - 1 - offset| + 0.5 w at w = 1 (the kink at the point or up to a few units of
    bfloat16 at 1, 2**-7 = 0.0078, away: where bfloat16 sums cancel, narrow rounding reaches
    that far): the float64 run's gradient is 0.5 -+ 1 on its side, the narrow value on the
    other side (or on the kink, 0.5) is explained by the kink."""
    exact = 0.5 + (1.0 if offset < 0 else -1.0)
    for narrow in (0.5, 0.5 - (1.0 if offset < 0 else -1.0)):
        sided = _judge(lambda w: abs(w[0] - 1.0 - offset) + 0.5 * w[0], 1.0, exact, narrow)
        assert sided is not None and sided[0].tolist() == [True], (offset, narrow)


# -- end to end: a smooth autograd rule in bfloat16 and float16 ------------------------------
#
# Scenario: shop demand. Rows of x are stores' features, w maps them to 4 (or 8) products'
# demand through swish(z) = z sigmoid(z) (its derivative sigmoid(z) (1 + z (1 - sigmoid(z)))
# follows from the product rule and sigmoid' = sigmoid (1 - sigmoid), from memory); t weighs
# each product's demand (a sum) or is its target (mean squared error). The rule is right by
# mpmath's differentiation of the same loss at the 16-bit values it computes with. The dot
# products of its backward sum terms that cancel (dz @ w.T), so the 16-bit gradient leaves its
# float64 run by more than the type's threshold at some coordinates while the loss is smooth.

def _shop(dtype_name: str, shape: tuple[int, int, int], factor: float = 1.0, seed: int = 0):
    from framework_kit import need, swish_function

    torch = need("torch")
    Swish = swish_function(factor)
    dtype = getattr(torch, dtype_name)
    r = np.random.default_rng(seed)
    x = torch.tensor(r.normal(size=shape[:2])).to(dtype)
    w = torch.tensor(r.normal(size=shape[1:]) * 0.5).to(dtype)
    t = torch.tensor(r.normal(size=(shape[0], shape[2]))).to(dtype)
    return Swish, {"w": w}, {"x": x, "t": t}


# (dtype, shape (stores, features, products), loss, seed): each reported a kink on some tensor
# before kinks needed their evidence (x; w and x; t; w and x).
SHOPS = [("bfloat16", (16, 8, 4), "sum", 0), ("float16", (16, 8, 4), "sum", 0), ("bfloat16", (16, 8, 4), "mse", 2),
         ("float16", (24, 12, 6), "mse", 6)]


def _forward(swish, loss: str):
    def forward(p, i):
        y = swish.apply(i["x"] @ p["w"])
        return ((y - i["t"]) ** 2).mean() if loss == "mse" else (y * i["t"]).sum()
    return forward


def _mp_row(x_row, w, t_row, loss, count):
    """mpmath's gradient of store ``x_row``'s share of the loss with respect to its features."""
    import mpmath

    from framework_kit import mp_gradient

    def share(xs):
        total = mpmath.mpf(0)
        for j in range(w.shape[1]):
            z = sum(xs[k] * mpmath.mpf(w[k, j]) for k in range(w.shape[0]))
            y = z / (1 + mpmath.exp(-z))
            total += (y - mpmath.mpf(t_row[j])) ** 2 / count if loss == "mse" else y * mpmath.mpf(t_row[j])
        return total

    return mp_gradient(share, x_row)


def _assert_right_by_mpmath(forward, params, inputs, shape, loss):
    """The rule's gradient for the last store's features is mpmath's within 64 units of the
    16-bit type (its terms' rounding), and its float64 run's within 1e-9."""
    import torch

    seen = {k: v.double().numpy() for k, v in {**params, **inputs}.items()}
    row = shape[0] - 1
    expected = _mp_row(seen["x"][row], seen["w"], seen["t"][row], loss, shape[0] * shape[2])
    for dt in (torch.float64, params["w"].dtype):
        x = inputs["x"].clone().to(dt).requires_grad_(True)
        forward({"w": params["w"].to(dt)}, {"x": x, "t": inputs["t"].to(dt)}).backward()
        got = x.grad.double().numpy()[row]
        allowed = 1e-9 if dt == torch.float64 else 64 * float(torch.finfo(dt).eps) * np.max(np.abs(expected))
        assert np.max(np.abs(got - expected)) <= allowed


@pytest.mark.parametrize("dtype_name,shape,loss,seed", SHOPS)
def test_a_smooth_16_bit_rule_passes(dtype_name, shape, loss, seed):
    """The right rule (by mpmath): every tensor passes, none is a kink."""
    swish, params, inputs = _shop(dtype_name, shape, seed=seed)
    forward = _forward(swish, loss)
    _assert_right_by_mpmath(forward, params, inputs, shape, loss)
    report = probe(forward, None, params, inputs)
    assert [t.status for t in report.tensors] == ["pass"] * 3, [(t.name, t.status) for t in report.tensors]


@pytest.mark.parametrize("factor", [1.1, 2.0, -1.0])
@pytest.mark.parametrize("dtype_name,shape,loss,seed", SHOPS[:2])
def test_a_wrong_16_bit_rule_still_fails(dtype_name, shape, loss, seed, factor):
    """The rule's gradient 10% off, doubled or of the wrong sign (each off mpmath's by that
    factor: the right rule agrees with mpmath above) fails for w and x."""
    swish, params, inputs = _shop(dtype_name, shape, factor, seed)
    report = probe(_forward(swish, loss), None, params, inputs)
    assert {t.name: t.status for t in report.tensors} == {"w": "fail", "x": "fail", "t": "pass"}


def test_a_16_bit_loss_summed_from_cancelling_terms_is_still_run_in_float64():
    """Seed 3: the bfloat16 loss, 64 terms of total size 34 summing to -0.196 (float64), comes
    out as -0.228: 16% off the float64 loss, yet within its own rounding (about u = 2**-8
    times the terms' size, several times over). The float64 run is the same computation:
    the check runs on it and the right rule passes (judged on bfloat16 arithmetic alone,
    every weight's loss rounds above the threshold and stays undecided); the 10% wrong one
    fails."""
    swish, params, inputs = _shop("bfloat16", (16, 8, 4), seed=3)
    forward = _forward(swish, "sum")
    _assert_right_by_mpmath(forward, params, inputs, (16, 8, 4), "sum")
    seen = {k: v.double().numpy() for k, v in {**params, **inputs}.items()}
    z = seen["x"] @ seen["w"]
    terms = z / (1 + np.exp(-z)) * seen["t"]
    assert abs(float(forward(params, inputs)) - terms.sum()) > 0.1 * abs(terms.sum())
    report = probe(forward, None, params, inputs)
    assert [t.status for t in report.tensors] == ["pass"] * 3, [(t.name, t.status) for t in report.tensors]
    swish, params, inputs = _shop("bfloat16", (16, 8, 4), factor=1.1, seed=3)
    report = probe(_forward(swish, "sum"), None, params, inputs)
    assert {t.name: t.status for t in report.tensors} == {"w": "fail", "x": "fail", "t": "pass"}


@pytest.mark.parametrize("stays", [False, True])
@pytest.mark.parametrize("other", [1.15, 2.0])
def test_a_float64_run_of_another_loss_is_not_used(other, stays):
    """Code whose float64 run computes another loss (a branch on the dtype scales it by
    ``other``) is judged on its float16 arithmetic, not on that run: its 15% (or 100%) lies
    far beyond the float16 loss's rounding (a few units of 2**-11 of a loss of a dozen terms
    of one sign). Its backward, right for the float16 loss (d/dz tanh z = 1 - tanh(z)**2,
    Abramowitz & Stegun 4.5.82, from memory), is not failed for the other one (float16 alone
    may leave it undecided). Also where backward returns float16 whatever it is given (only
    forward would have a float64 run)."""
    r = np.random.default_rng(2)
    x, w, c = r.normal(size=(4, 3)), r.normal(size=(3, 3)) * 0.5, np.abs(r.normal(size=(4, 3)))

    def forward(p, i):
        scale = other if p["w"].dtype == np.float64 else 1.0
        return np.sum((np.tanh(i["x"] @ p["w"]) + 2.0) * i["c"]) * scale

    def backward(p, i):
        t = np.tanh(i["x"] @ p["w"])
        g = i["x"].T @ (i["c"] * (1 - t * t))
        return {"w": g.astype(np.float16) if stays else g}

    report = probe(forward, backward, {"w": w.astype(np.float16)},
                   {"x": x.astype(np.float16), "c": c.astype(np.float16)})
    assert not any("float64" in note for note in report.notes), report.notes
    assert report.tensor("w").status in ("pass", "inconclusive")


def _relu_shop(factor: float = 1.0):
    """Shop demand through relu with a hand-written rule (relu' is 1 above 0 and 0 below, by
    its definition), an array output (each element weighed by the check's own upstream
    gradient): its bfloat16 loss leaves its float64 run by about 40%, within its rounding."""
    from framework_kit import need

    torch = need("torch")

    class Relu(torch.autograd.Function):
        @staticmethod
        def forward(ctx, z):
            ctx.save_for_backward(z)
            return z.clamp(min=0)

        @staticmethod
        def backward(ctx, g):
            (z,) = ctx.saved_tensors
            return g * (z > 0).to(g.dtype) * factor

    r = np.random.default_rng(1)
    x = torch.tensor(r.normal(size=(32, 16))).to(torch.bfloat16)
    w = torch.tensor(r.normal(size=(16, 8)) * 0.5).to(torch.bfloat16)
    return lambda p, i: Relu.apply(i["x"] @ p["w"]), {"w": w}, {"x": x}


@pytest.mark.parametrize("factor", [1.0, 1.1])
def test_the_float64_run_gets_a_float64_upstream_gradient(factor):
    """The float64 run taken for a bfloat16 loss within its rounding of it is called with the
    upstream gradient in float64 (rounded to bfloat16 it would leave every float64 gradient
    about 2**-9 off its numeric derivatives): the right rule passes, a 10% wrong one fails."""
    forward, params, inputs = _relu_shop(factor)
    report = probe(forward, None, params, inputs)
    want = "pass" if factor == 1.0 else "fail"
    assert {t.name: t.status for t in report.tensors} == {"w": want, "x": want}
