"""The numeric side of second derivatives against mpmath's high-precision differentiation,
and a ReLU network's hand-written Hessian-vector product (kinks) confirmed by PyTorch's
double backward."""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe
from gradprobe.engine.evaluate import LossFunction
from gradprobe.engine.evaluator import Evaluator
from gradprobe.engine.second_forward import mixed_difference
from gradprobe.engine.second_numeric import KINK, PASS, Slopes
from gradprobe.engine.second_source import GradientField, HessianSource, Layout
from gradprobe.common.tensors import Workspace

mpmath.mp.dps = 40


def _f_mp(x0, x1, x2):
    return mpmath.exp(mpmath.sin(x0) * x1) + x2**3 * mpmath.log(1 + x1**2) / 7


def _f(p, i):
    x0, x1, x2 = p["x"]
    return float(np.exp(np.sin(x0) * x1) + x2**3 * np.log(1 + x1**2) / 7)


def _g(p, i):
    x0, x1, x2 = p["x"]
    e = np.exp(np.sin(x0) * x1)
    return {"x": np.array([e * np.cos(x0) * x1,
                           e * np.sin(x0) + x2**3 * 2 * x1 / (1 + x1**2) / 7,
                           3 * x2**2 * np.log(1 + x1**2) / 7])}


POINT = np.array([0.8, -1.3, 2.1])


def _truth(i, j):
    orders = [0, 0, 0]
    orders[i] += 1
    orders[j] += 1
    return float(mpmath.diff(_f_mp, tuple(mpmath.mpf(float(v)) for v in POINT), tuple(orders)))


def _pieces():
    ws = Workspace({"x": POINT.copy()}, {})
    layout = Layout.of(ws)
    return ws, layout, GradientField(_g, ws, layout)


class _Exact(HessianSource):
    form = "test"

    def __init__(self, matrix):
        super().__init__()
        self.matrix = matrix

    def hv(self, w):
        return self.matrix @ w


def test_slopes_match_mpmath_within_their_error():
    """Each column from backward's central difference lies within its own error estimate of
    mpmath's 40-digit second derivative, and is judged a pass against the true Hessian."""
    truth = np.array([[_truth(i, j) for j in range(3)] for i in range(3)])
    ws, layout, field = _pieces()
    g0 = field.at({})
    slopes = Slopes(field, _Exact(truth), g0, float(np.finfo(float).eps), 1e-6, np.zeros(3))
    for j in range(3):
        d = np.zeros(3)
        d[j] = 1.0
        along = slopes.along(d)
        assert np.all(along.code == PASS)
        assert np.all(np.abs(along.numeric - truth[:, j]) <= along.error + 1e-9 * np.abs(truth[:, j]))


def test_mixed_difference_bound_holds_against_mpmath():
    """Forward's mixed second difference is within its claimed error of u'Hv computed from
    mpmath's Hessian, and the claim is not vacuous (well under 1e-4 relative here)."""
    truth = np.array([[_truth(i, j) for j in range(3)] for i in range(3)])
    ws, layout, _ = _pieces()
    evaluator = Evaluator(LossFunction(_f, ws, None))
    rng = np.random.default_rng(4)
    for _ in range(4):
        u, v = rng.standard_normal(3), rng.standard_normal(3)
        exact = u @ truth @ v
        m = mixed_difference(evaluator, layout, POINT, u, v, float(np.finfo(float).eps),
                             8 * 2.2e-16 * abs(_f({"x": POINT}, {})), np.array(_g({"x": POINT}, {})["x"]))
        assert abs(m.value - exact) <= m.error
        assert m.error < 1e-4 * max(abs(exact), 1e-3)
        assert m.evaluations in (12, 24, 36, 48)  # three steps, widened at most three times


def test_mixed_difference_across_a_kink_claims_no_bound():
    """|x0 - x1| has a kink through the point: the three step sizes disagree as no h**2 model
    allows, so no finite error bound is claimed (nothing is failed on it)."""
    ws = Workspace({"x": np.array([0.5, 0.5])}, {})
    layout = Layout.of(ws)
    evaluator = Evaluator(LossFunction(lambda p, i: float(abs(p["x"][0] - p["x"][1])), ws, None))
    m = mixed_difference(evaluator, layout, np.array([0.5, 0.5]), np.array([1.0, 0.0]),
                         np.array([0.0, 1.0]), 2.2e-16, 1e-15, np.zeros(2))
    assert not np.isfinite(m.error)


# -- a ReLU network -----------------------------------------------------------------------

def _relu_setup(kinked):
    rng = np.random.default_rng(5)
    x, y = rng.normal(size=(30, 4)), rng.normal(size=(30, 1))
    b = np.zeros(8) if kinked else rng.normal(size=8) * 0.1
    if kinked:
        x[0] = 0.0  # this plot's pre-activations are exactly 0: on every unit's kink
    params = {"hidden": {"W": rng.normal(size=(4, 8)) * 0.7, "b": b},
              "out": {"W": rng.normal(size=(8, 1)), "b": np.zeros(1)}}
    return params, {"x": x, "y": y}


def _parts(p, i):
    z = i["x"] @ p["hidden"]["W"] + p["hidden"]["b"]
    a = np.maximum(z, 0.0)
    return z, a, a @ p["out"]["W"] + p["out"]["b"]


def relu_forward(p, i):
    return 0.5 * float(np.sum((_parts(p, i)[2] - i["y"]) ** 2))


def relu_backward(p, i):
    z, a, pred = _parts(p, i)
    dp, m = pred - i["y"], z > 0
    dz = (dp @ p["out"]["W"].T) * m
    return {"hidden": {"W": i["x"].T @ dz, "b": dz.sum(0)}, "out": {"W": a.T @ dp, "b": dp.sum(0)}}


def relu_hvp(p, i, v):
    """Forward-over-reverse by hand: the R-operator applied to relu_backward."""
    z, a, pred = _parts(p, i)
    dp, m, w2 = pred - i["y"], z > 0, p["out"]["W"]
    rz = i["x"] @ v["hidden"]["W"] + v["hidden"]["b"]
    ra = rz * m
    rp = ra @ w2 + a @ v["out"]["W"] + v["out"]["b"]
    rdz = (rp @ w2.T + dp @ v["out"]["W"].T) * m
    return {"hidden": {"W": i["x"].T @ rdz, "b": rdz.sum(0)},
            "out": {"W": ra.T @ dp + a.T @ rp, "b": rp.sum(0)}}


def test_relu_hvp_matches_pytorch_double_backward():
    """The hand-written product equals PyTorch's reverse-over-reverse product (away from
    the kinks, where both are defined the same way)."""
    torch = pytest.importorskip("torch")
    params, inputs = _relu_setup(kinked=False)
    names = [("hidden", "W"), ("hidden", "b"), ("out", "W"), ("out", "b")]
    ts = [torch.tensor(params[a][b], dtype=torch.float64, requires_grad=True) for a, b in names]
    x, y = torch.tensor(inputs["x"]), torch.tensor(inputs["y"])
    loss = 0.5 * ((torch.relu(x @ ts[0] + ts[1]) @ ts[2] + ts[3] - y) ** 2).sum()
    grads = torch.autograd.grad(loss, ts, create_graph=True)
    rng = np.random.default_rng(9)
    v = {a: {} for a, _ in names}
    for a, b in names:
        v[a][b] = rng.standard_normal(params[a][b].shape)
    dot = sum((g * torch.tensor(v[a][b])).sum() for g, (a, b) in zip(grads, names))
    reference = torch.autograd.grad(dot, ts)
    mine = relu_hvp(params, inputs, v)
    for r, (a, b) in zip(reference, names):
        np.testing.assert_allclose(mine[a][b], r.numpy(), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("kinked", [False, True])
def test_relu_network_hvp_passes(kinked):
    """A correct ReLU network's HVP is not failed; with a plot on every unit's kink the
    blocks it touches are kinks."""
    params, inputs = _relu_setup(kinked)
    report = probe(relu_forward, relu_backward, params, inputs, hvp=relu_hvp)
    so = report.second_order
    assert report.ok and so.status in ("pass", "kink") and not so.failing_blocks
    assert so.symmetric == "pass" and so.error_enters_at is None
    if kinked:
        assert any(b.status == "kink" and b.kinks for b in so.blocks)


def test_relu_network_with_a_wrong_hvp_fails():
    """The same network with the mask left off one term of the product: caught at a kink-free
    point, in the hidden blocks."""
    def wrong(p, i, v):
        out = relu_hvp(p, i, v)
        z, a, pred = _parts(p, i)
        rz = i["x"] @ v["hidden"]["W"] + v["hidden"]["b"]
        rp = rz @ p["out"]["W"]  # bug: the ReLU mask is missing from this path
        rdz = (rp @ p["out"]["W"].T) * (z > 0)
        out["hidden"]["b"] = out["hidden"]["b"] + 0.0 * rdz.sum(0) + (rz * (z <= 0)).sum(0)
        return out

    params, inputs = _relu_setup(kinked=False)
    so = probe(relu_forward, relu_backward, params, inputs, hvp=wrong).second_order
    assert so.status == "fail" and so.error_enters_at == "hessian"
    assert {b.rows for b in so.failing_blocks} == {"hidden.b"}


def test_codes_are_ordered_like_statuses():
    assert (PASS, KINK) == (0, 1)


def test_relu_network_missing_cross_layer_terms_fail_even_on_kinks():
    """At the kinked point, the product without its hidden × out terms still fails in
    exactly those blocks, with the missing-block hint: kinks do not hide a wrong Hessian."""
    def no_cross(p, i, v):
        zero = {k: np.zeros_like(x) for k, x in v["out"].items()}
        zh = {k: np.zeros_like(x) for k, x in v["hidden"].items()}
        own_hidden = relu_hvp(p, i, {"hidden": v["hidden"], "out": zero})
        own_out = relu_hvp(p, i, {"hidden": zh, "out": v["out"]})
        return {"hidden": own_hidden["hidden"], "out": own_out["out"]}

    params, inputs = _relu_setup(kinked=True)
    so = probe(relu_forward, relu_backward, params, inputs, hvp=no_cross).second_order
    assert so.status == "fail" and so.error_enters_at == "hessian"
    layers = {(b.rows.split(".")[0], b.cols.split(".")[0]) for b in so.failing_blocks}
    assert layers == {("hidden", "out"), ("out", "hidden")}
    assert any(b.hint and "missing" in b.hint for b in so.failing_blocks)
