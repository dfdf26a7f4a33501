"""What backward returns is validated: missing, extra, misshaped and non-finite gradients fail."""

from __future__ import annotations

import numpy as np

from gradprobe import probe

W = np.arange(6.0).reshape(2, 3) / 10
B = np.array([0.1, -0.2, 0.3, 0.05, 0.0, 1.0])


def forward(p, i):
    return float(np.sum(p["W"] ** 2) + np.sum(np.sin(p["b"])))


def grads(**override):
    g = {"W": 2 * W, "b": np.cos(B)}
    g.update(override)
    return {k: v for k, v in g.items() if v is not None}


def _run(g):
    return probe(forward, lambda p, i: g, {"W": W, "b": B})


def test_missing_gradient_fails_that_tensor_only():
    report = _run(grads(b=None))
    assert not report.ok
    assert report.tensor("b").status == "fail" and "no gradient for b" in report.tensor("b").hint
    assert report.tensor("W").status == "pass"
    assert any("no gradient for b" in e for e in report.errors)


def test_gradient_for_an_unknown_name_fails():
    g = grads()
    g["bias"] = np.zeros(6)
    report = _run(g)
    t = report.tensor("bias")
    assert not report.ok and t.kind == "unknown" and "neither a param nor an input" in t.hint


def test_transposed_shape_is_named_as_such():
    t = _run(grads(W=(2 * W).T)).tensor("W")
    assert t.status == "fail" and "transpose" in t.hint and "(3, 2)" in t.hint


def test_a_row_vector_for_a_vector_is_not_reshaped():
    t = _run(grads(b=np.cos(B).reshape(1, 6))).tensor("b")
    assert t.status == "fail" and "has shape (1, 6) but the tensor is (6,)" in t.hint


def test_non_finite_gradient_fails():
    bad = np.cos(B)
    bad[2] = np.nan
    t = _run(grads(b=bad)).tensor("b")
    assert t.status == "fail" and "1 non-finite value" in t.hint


def test_non_finite_gradient_elements_are_named_and_located():
    """A NaN and an inf in a 2-D gradient: the failure says where, in the hint and bad_indices."""
    bad = 2 * W
    bad[1, 0] = np.nan
    bad[0, 2] = -np.inf
    t = _run(grads(W=bad)).tensor("W")
    assert t.status == "fail" and "2 non-finite values" in t.hint
    assert "[1, 0]" in t.hint and "[0, 2]" in t.hint
    assert set(t.bad_indices) == {(1, 0), (0, 2)} and t.failed == 2


def test_input_gradients_are_optional_and_checked_when_returned():
    x = np.array([0.3, -0.7])

    def fwd(p, i):
        return float(np.sum(p["w"] * i["x"] ** 2))

    without = probe(fwd, lambda p, i: {"w": i["x"] ** 2}, {"w": np.array([1.5, 2.0])}, {"x": x})
    assert [t.name for t in without.tensors] == ["w"]
    wrong = probe(fwd, lambda p, i: {"w": i["x"] ** 2, "x": p["w"] * i["x"]},
                  {"w": np.array([1.5, 2.0])}, {"x": x})
    t = wrong.tensor("x")
    assert t.kind == "input" and t.layer == "inputs" and t.status == "fail"


def test_integer_inputs_are_never_perturbed():
    seen = []

    def fwd(p, i):
        seen.append(i["idx"].copy())
        return float(np.sum(p["table"][i["idx"]] ** 2))

    def bwd(p, i):
        g = np.zeros_like(p["table"])
        np.add.at(g, i["idx"], 2 * p["table"][i["idx"]])
        return {"table": g}

    idx = np.array([0, 2, 2, 3])
    report = probe(fwd, bwd, {"table": np.linspace(-1, 1, 5)}, {"idx": idx})
    assert report.ok
    assert all(np.array_equal(s, idx) for s in seen)
