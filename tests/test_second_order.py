"""Second derivatives (protocol section 7) against outside references: sympy's symbolic
Hessians (tests/second_kit.py), SciPy's published Rosenbrock Hessian and Hessian-vector
product, and a ReLU network whose hand-written product is confirmed by PyTorch's double
backward (the framework's reverse mode, not any checking helper)."""

from __future__ import annotations

import numpy as np
import pytest
from second_kit import SympyTarget

from gradprobe import probe, probe_target
from gradprobe.report.second import SecondOrderResult


def _so(report) -> SecondOrderResult:
    assert report.second_order is not None
    return report.second_order


@pytest.mark.parametrize("form", ["hvp", "hessian"])
def test_correct_symbolic_hessian_passes(form):
    """sympy's exact Hessian, given as hvp or dense, passes every block, symmetric, no entry."""
    report = probe_target(SympyTarget(form))
    so = _so(report)
    assert report.ok and so.status == "pass" and so.symmetric == "pass"
    assert so.error_enters_at is None and so.form == form
    assert {(b.rows, b.cols) for b in so.blocks} == {
        ("weights", "weights"), ("weights", "mix"), ("mix", "weights"), ("mix", "mix")}
    assert all(b.checked == b.size for b in so.blocks)  # small: every element compared
    assert max(b.max_rel_error for b in so.blocks) < 1e-7
    assert so.forward.status == "pass" and so.forward.resolution < 1e-4


def _drop_cross(h):
    h = h.copy()
    h[:2, 2:] = 0.0
    h[2:, :2] = 0.0
    return h


@pytest.mark.parametrize("form", ["hvp", "hessian"])
def test_missing_cross_block_fails_in_the_hessian(form):
    """The weights × mix blocks zeroed: exactly those blocks fail, with the missing-block hint."""
    report = probe_target(SympyTarget(form, hess_bug=_drop_cross))
    so = _so(report)
    assert not report.ok and so.status == "fail" and so.error_enters_at == "hessian"
    failing = {(b.rows, b.cols) for b in so.failing_blocks}
    assert failing == {("weights", "mix"), ("mix", "weights")}
    for b in so.failing_blocks:
        assert b.hint is not None and "cross term" in b.hint and "missing" in b.hint
    assert so.block("weights", "weights").hint is None
    assert so.symmetric == "pass"  # zeroing both mirror blocks keeps it symmetric


def _upper_only(h):
    return np.triu(h)


@pytest.mark.parametrize("form", ["hvp", "hessian"])
def test_asymmetric_hessian_fails_symmetry(form):
    """Only the upper triangle filled: symmetry fails and the hint names the triangle."""
    so = _so(probe_target(SympyTarget(form, hess_bug=_upper_only)))
    assert so.status == "fail" and so.symmetric == "fail" and so.error_enters_at == "hessian"
    assert so.symmetry_max_rel_error > 1e-2
    hints = [b.hint for b in so.failing_blocks if b.hint]
    assert hints and all("upper triangle is filled" in h for h in hints)


def test_lower_cross_block_left_empty_is_named_as_a_triangle():
    """Block mix × weights (below the diagonal) zero, its mirror right: the triangle hint."""
    def lower_empty(h):
        h = h.copy()
        h[2:, :2] = 0.0
        return h

    so = _so(probe_target(SympyTarget("hessian", hess_bug=lower_empty)))
    assert [(b.rows, b.cols) for b in so.failing_blocks] == [("mix", "weights")]
    assert "upper triangle is filled and the lower is not" in so.failing_blocks[0].hint
    assert so.symmetric == "fail"


def test_doubled_diagonal_is_named():
    """Diagonal of the mix block twice the true one, the rest exact: the factor-2 hint."""
    def doubled(h):
        h = h.copy()
        idx = np.arange(2, 6)
        h[idx, idx] *= 2.0
        return h

    so = _so(probe_target(SympyTarget("hessian", hess_bug=doubled)))
    assert [(b.rows, b.cols) for b in so.failing_blocks] == [("mix", "mix")]
    assert "factor of 2 on the diagonal" in so.failing_blocks[0].hint


def test_a_wrong_value_gets_no_pattern_hint():
    """One element off by 30 %, mirrored: it fails and no hint is made up."""
    def one_off(h):
        h = h.copy()
        h[0, 3] *= 1.3
        h[3, 0] *= 1.3
        return h

    so = _so(probe_target(SympyTarget("hessian", hess_bug=one_off)))
    assert {(b.rows, b.cols) for b in so.failing_blocks} == {("weights", "mix"), ("mix", "weights")}
    assert all(b.hint is None for b in so.blocks)
    block = so.block("weights", "mix")
    assert block.failed == 1 and block.worst_index == ((0,), (0, 1))


def _gradient_bug(x, g):
    g = g.copy()
    g[0] += 0.5 * x[0] * x[2]  # a spurious term in d/dw0
    return g


def _hessian_of_gradient_bug(x, h):
    h = h.copy()  # the sympy Hessian plus the derivative of the spurious term (not symmetric)
    h[0, 0] += 0.5 * x[2]
    h[0, 2] += 0.5 * x[0]
    return h


def test_hessian_of_a_wrong_gradient_says_the_error_enters_at_the_gradient():
    """H is the exact derivative of a wrong backward: check 1 passes, forward disagrees."""
    target = SympyTarget("hvp", grad_bug=_gradient_bug, grad_bug_hessian=_hessian_of_gradient_bug)
    report = probe_target(target)
    so = _so(report)
    assert so.status == "fail" and so.error_enters_at == "gradient"
    assert not so.failing_blocks  # H agrees with backward's derivative
    assert so.forward.status == "fail" and so.forward.failing_pairs
    assert report.tensor("weights").status == "fail"


def test_a_right_hessian_beside_a_wrong_gradient_blames_the_gradient():
    """The exact Hessian with the wrong backward: blocks disagree with backward's derivative,
    forward's second differences side with the Hessian."""
    so = _so(probe_target(SympyTarget("hvp", grad_bug=_gradient_bug)))
    assert so.failing_blocks and so.error_enters_at == "gradient"


def test_scipy_rosenbrock_reference_passes_in_both_forms():
    """SciPy's hand-written Rosenbrock derivatives, scipy.optimize.rosen_der, rosen_hess and
    rosen_hess_prod: published reference code, checked as a user's would be."""
    from scipy.optimize import rosen, rosen_der, rosen_hess, rosen_hess_prod

    params = {"x": np.array([-1.2, 1.0, 0.8, 1.3, -0.5, 0.9])}
    fwd = lambda p, i: float(rosen(p["x"]))  # noqa: E731
    bwd = lambda p, i: {"x": rosen_der(p["x"])}  # noqa: E731
    by_product = probe(fwd, bwd, params, hvp=lambda p, i, v: {"x": rosen_hess_prod(p["x"], v["x"])})
    dense = probe(fwd, bwd, params, hessian=lambda p, i: rosen_hess(p["x"]))
    for report in (by_product, dense):
        so = _so(report)
        assert report.ok and so.status == "pass" and so.symmetric == "pass"
        assert so.block("x", "x").checked == 36
    assert _so(by_product).form == "hvp" and _so(dense).form == "hessian"


def test_scipy_rosenbrock_with_a_transposed_coupling_fails():
    """rosen_hess with its sub-diagonal shifted (x[i] coupled to x[i+2]): caught."""
    from scipy.optimize import rosen, rosen_der, rosen_hess

    def wrong(p, i):
        h = rosen_hess(p["x"])
        off = np.diag(h, 1).copy()
        h = h - np.diag(off, 1) - np.diag(off, -1)
        return h + np.diag(off[:-1], 2) + np.diag(off[:-1], -2)

    report = probe(lambda p, i: float(rosen(p["x"])), lambda p, i: {"x": rosen_der(p["x"])},
                   {"x": np.array([-1.2, 1.0, 0.8, 1.3, -0.5, 0.9])}, hessian=wrong)
    assert _so(report).status == "fail" and _so(report).error_enters_at == "hessian"
    assert not report.ok


def test_caller_arrays_are_unchanged():
    """Bitwise the same params and inputs after a failing second-order check."""
    target = SympyTarget("hvp", hess_bug=_upper_only)
    params, inputs = target.setup()
    before = {k: v.copy() for k, v in params.items()}
    probe(target.forward, target.backward, params, inputs, hvp=target.hvp)
    assert all(np.array_equal(params[k], before[k]) and params[k].tobytes() == before[k].tobytes()
               for k in params)


def test_second_order_off_skips():
    """second_order='off': no second_order result, and the buggy Hessian no longer fails."""
    target = SympyTarget("hvp", hess_bug=_drop_cross)
    report = probe_target(target, second_order="off")
    assert report.second_order is None and report.ok


def test_no_form_gives_null():
    from gradprobe.render.json import report_dict

    target = SympyTarget("hvp")
    report = probe(target.forward, target.backward, target.setup()[0])
    assert report.second_order is None and report_dict(report)["second_order"] is None


def test_dense_check_costs_linear_backward_calls():
    """A dense Hessian of side n is checked with O(n) backward calls (2 per column, 2 per
    random direction, one at the base point), not O(n^2) forward calls."""
    from scipy.optimize import rosen, rosen_der, rosen_hess

    for n in (8, 32):
        report = probe(lambda p, i: float(rosen(p["x"])), lambda p, i: {"x": rosen_der(p["x"])},
                       {"x": np.linspace(-1, 1.5, n)}, hessian=lambda p, i: rosen_hess(p["x"]))
        so = _so(report)
        assert so.backward_calls == 2 * n + 2 * 2 + 1
        assert so.hessian_calls == 1
        assert so.evaluations == 12 * 1  # one pair of directions, three step sizes, 4 calls


def test_transposed_cross_block_is_named():
    """Two tensors of three elements coupled through a non-symmetric matrix (sympy's exact
    Hessian); the dense Hessian given with both cross blocks transposed stays symmetric, and
    the hint says transposed."""
    import sympy as sp

    p, q = sp.symbols("p0:3"), sp.symbols("q0:3")
    coupling = [[1, 2, -1], [0, 3, 1], [2, -2, 1]]
    loss = (sum(coupling[i][j] * p[i] * q[j] for i in range(3) for j in range(3))
            + sum(sp.cos(s) for s in p + q) + sum(s**4 for s in p + q) / 12)
    symbols = (*p, *q)
    f = sp.lambdify(symbols, loss, "numpy")
    g = sp.lambdify(symbols, [sp.diff(loss, s) for s in symbols], "numpy")
    h = sp.lambdify(symbols, sp.hessian(loss, symbols), "numpy")

    def vec(params):
        return np.concatenate([params["p"], params["q"]])

    def hessian(params, inputs):
        m = np.array(h(*vec(params)), dtype=float)
        m[:3, 3:] = m[:3, 3:].T.copy()
        m[3:, :3] = m[3:, :3].T.copy()
        return m

    params = {"p": np.array([0.3, -0.7, 1.1]), "q": np.array([0.9, 0.2, -0.4])}
    report = probe(lambda pr, i: float(f(*vec(pr))),
                   lambda pr, i: dict(zip(("p", "q"), np.split(np.array(g(*vec(pr)), dtype=float), 2))),
                   params, hessian=hessian)
    so = _so(report)
    assert {(b.rows, b.cols) for b in so.failing_blocks} == {("p", "q"), ("q", "p")}
    assert all("transpose" in b.hint for b in so.failing_blocks)
    assert so.symmetric == "pass" and so.error_enters_at == "hessian"
