"""Hints where a value is reused (repeated indices, overlapping windows, time steps, layers
before a layer), end to end through ``gradprobe.probe``, and their decoys: a different bug
with similar numbers gets no hint, or one that names both causes."""

from __future__ import annotations

import numpy as np
import pytest
from bugzoo import Tally
from bugzoo_decoys import DECOY_CASES
from bugzoo_reuse import (
    REUSE_CASES,
    _assign,
    _embedding_data,
    _mlp_data,
    embedding_backward,
    mlp_backward,
    mlp_forward,
)

import gradprobe
from gradprobe import render_text
from gradprobe.hints import Context, Evidence, diagnose, hint_for

ALL = REUSE_CASES + DECOY_CASES


def _probe(case):
    return gradprobe.probe(case.forward, case.backward, case.params, case.inputs)


@pytest.mark.parametrize("make", ALL, ids=lambda make: make.__name__)
def test_each_case_gets_its_hint_or_none_and_nothing_else_fails(make):
    case = make()
    report = _probe(case)
    tally = Tally()
    tally.add(case, report)
    assert tally.lines == [], render_text(report)
    assert tally.missed == tally.false_failures == 0


GOLDEN = {
    ("embedding_mixed_signs_assigned", "embed.table"):
        "wrong exactly at the rows that idx uses more than once and right where it uses them "
        "once: gradients are assigned instead of accumulated there (use np.add.at, or += in a loop)",
    ("conv_assigned_per_window", "footfall"):
        "wrong exactly where sliding windows overlap, each element holding one window's share: "
        "the input gradient is assigned per window instead of accumulated (+= over the windows)",
    ("rnn_assigned_per_step", "cell.Wh"):
        "analytic holds only the term of item 0 (of 6) of x, not the sum over all items: it is "
        "assigned instead of accumulated (+=) in a loop over those items",
    ("rnn_no_path_back_last_loss", "cell.Wx"):
        "analytic holds only the term of item 5 (of 6) of x, not the sum over all items: either "
        "it is assigned instead of accumulated (+=) in a loop over those items, or the gradient is "
        "not carried back from item 5 to the others (a missing path back through time)",
    ("rnn_no_path_back_last_loss", "x"):
        "right only in row 5 and zero elsewhere: either a loop or sum over axis 0 is missing, so "
        "backward handles one item only, or the gradient is not carried back from that item to "
        "the others (a missing path back through time)",
    ("mlp_wrong_input_gradient", "l1.W"):
        "every tensor of layer l1 fails and none from l2 on does: the gradient l2 passes back "
        "(its input gradient, or the derivative of an activation between l1 and l2) is the likely "
        "cause; checking the model as a layer stack would localise it",
}


@pytest.mark.parametrize("key", list(GOLDEN), ids=lambda key: f"{key[0]}-{key[1]}")
def test_golden_sentences(key):
    make = next(m for m in ALL if m.__name__ == key[0])
    assert _probe(make()).tensor(key[1]).hint == GOLDEN[key]


def test_mixed_signs_make_some_assigned_rows_larger_than_the_sum():
    """The case the old size test missed: an assigned row can exceed the accumulated one."""
    params, inputs = _embedding_data()
    assigned = embedding_backward(params, inputs, _assign)["embed"]["table"]
    summed = embedding_backward(params, inputs, np.add.at)["embed"]["table"]
    repeated = np.bincount(inputs["idx"], minlength=10) >= 2
    assert np.any(np.abs(assigned[repeated]) > np.abs(summed[repeated]))


def _evidence(analytic, numeric, name="w", tol=1e-9):
    analytic = np.asarray(analytic, dtype=float)
    numeric = np.asarray(numeric, dtype=float)
    shape = analytic.shape
    a, n = analytic.reshape(-1), numeric.reshape(-1)
    failed = np.abs(a - n) > tol * max(1.0, float(np.abs(n).max()))
    return Evidence(name, shape, np.arange(a.size), a, n, failed)


def _strided(upstream, kernel, stride, length, assign, reverse=False):
    out = np.zeros(length)
    order = range(len(upstream) - 1, -1, -1) if reverse else range(len(upstream))
    for j in order:
        window = slice(j * stride, j * stride + len(kernel))
        out[window] = upstream[j] * kernel if assign else out[window] + upstream[j] * kernel
    return out


@pytest.mark.parametrize("reverse", [False, True])
def test_strided_windows_in_either_loop_order(reverse):
    """Windows of 3 at stride 2 overlap on every other element; either loop order fits."""
    rng = np.random.default_rng(2)
    r, k = rng.normal(size=7), rng.normal(size=3)
    numeric = _strided(r, k, 2, 15, assign=False)
    analytic = _strided(r, k, 2, 15, assign=True, reverse=reverse)
    assert "assigned per window" in hint_for(_evidence(analytic, numeric), Context())


def test_windows_on_several_channels_must_each_fit():
    """Rows of a batch of signals, each assigned per window, along the last axis."""
    rng = np.random.default_rng(4)
    rows = [(rng.normal(size=9), rng.normal(size=4)) for _ in range(3)]
    numeric = np.array([_strided(r, k, 1, 12, assign=False) for r, k in rows])
    analytic = np.array([_strided(r, k, 1, 12, assign=True) for r, k in rows])
    assert "along the last axis" in hint_for(_evidence(analytic, numeric), Context())
    analytic[1] = numeric[1] + rng.normal(size=12) * (np.arange(12) % 11 != 0)  # a random row
    assert hint_for(_evidence(analytic, numeric), Context()) is None


def test_index_along_the_second_axis():
    """A table used as W[:, idx]: the repeated columns are named as indices along axis 1."""
    rng = np.random.default_rng(6)
    idx = np.array([0, 2, 2, 3, 5, 5, 5])
    contributions = rng.normal(size=(4, idx.size))
    numeric, analytic = np.zeros((4, 6)), np.zeros((4, 6))
    np.add.at(numeric.T, idx, contributions.T)
    analytic[:, idx] = contributions
    hint = hint_for(_evidence(analytic, numeric), Context(index_inputs={"idx": idx}))
    assert hint is not None and hint.startswith("wrong exactly at the indices along axis 1 that idx")


def _assigned_and_summed(idx, rows):
    """(rows assigned at idx, rows summed at idx) into 3 rows: a wrong and a right gradient."""
    numeric = np.zeros((3, 2))
    np.add.at(numeric, idx, rows)
    analytic = np.zeros((3, 2))
    analytic[idx] = rows
    return analytic, numeric


def test_equal_contributions_fit_averaging_as_well_so_no_hint():
    """When every repeat contributes the same, assigning one equals the mean: two causes."""
    idx = np.array([0, 1, 1, 2])
    rows = np.array([[1.0, 2.0], [0.5, -1.0], [0.5, -1.0], [3.0, 1.0]])
    analytic, numeric = _assigned_and_summed(idx, rows)
    assert hint_for(_evidence(analytic, numeric), Context(index_inputs={"idx": idx})) is None


def test_every_row_repeated_tells_nothing():
    """If an index uses every row twice, no row shows that a single use is right."""
    idx = np.array([0, 0, 1, 1, 2, 2])
    rng = np.random.default_rng(8)
    rows = rng.normal(size=(6, 2))
    analytic, numeric = _assigned_and_summed(idx, rows)
    assert hint_for(_evidence(analytic, numeric), Context(index_inputs={"idx": idx})) is None


def test_two_layers_before_the_boundary_agree_in_number():
    """l3 passes back a wrong gradient: l1 and l2 fail, named as the 2 layers before l3."""
    params, inputs = _mlp_data()

    def backward(p, i):
        g = mlp_backward(p, i)
        g["l2"] = {"W": -g["l2"]["W"], "b": 2 * g["l2"]["b"]}
        g["l1"] = {"W": 3 * g["l1"]["W"], "b": -g["l1"]["b"]}
        return g

    report = gradprobe.probe(mlp_forward, backward, params, inputs)
    hint = report.tensor("l2.b").hint
    assert hint.startswith("every tensor of the 2 layers before l3 fails and none from l3 on does")
    assert {t.name for t in report.tensors if t.status == "fail"} == {"l1.W", "l1.b", "l2.W", "l2.b"}


def test_boundary_needs_every_param_measured_and_two_failures():
    ok = _evidence([1.0, 2.0], [1.0, 2.0], "l2.W")
    bad = [_evidence([1.0, 5.0], [1.0, 2.0], "l1.W"), _evidence([4.0], [3.0], "l1.b")]
    ctx = Context(param_names=("l1.W", "l1.b", "l2.W"))
    assert "l2 passes back" in diagnose([*bad, ok], ctx)["l1.b"]
    assert "passes back" not in str(diagnose(bad, ctx))  # l2.W unmeasured: nothing known of it
    single = Context(param_names=("l1.W", "l2.W"))
    assert "passes back" not in str(diagnose([bad[0], ok], single))


@pytest.mark.parametrize("make", ALL, ids=lambda make: make.__name__)
def test_hints_are_one_sentence_without_a_questioning_suggestion(make):
    """Every hint: one sentence, no question mark, no trailing or inner full stop."""
    for t in _probe(make()).tensors:
        if t.hint and t.checked:
            assert "?" not in t.hint and not t.hint.endswith(".") and ". " not in t.hint


@pytest.mark.parametrize("shape", [(8,), (12,), (20,), (3, 12), (10, 4)])
def test_short_random_errors_fit_no_pattern(shape):
    """Random errors on short tensors, where a window or term pattern is easiest to match by
    chance, with float and integer inputs in the context: 400 seeds, no hint."""
    size = int(np.prod(shape))
    ctx = Context(inputs={"x": np.random.default_rng(1).normal(size=(6, shape[-1]))},
                  index_inputs={"idx": np.array([0, 1, 1, 2])})
    for seed in range(400):
        rng = np.random.default_rng(seed)
        numeric = rng.normal(size=size)
        analytic = numeric.copy()
        where = rng.choice(size, size=rng.integers(1, size), replace=False)
        analytic[where] += rng.normal(scale=rng.uniform(0.01, 2.0), size=where.size)
        assert hint_for(_evidence(analytic.reshape(shape), numeric.reshape(shape)), ctx) is None, seed


def test_boundary_ignores_integer_params():
    """An integer param (never perturbed, no gradient) does not hide the boundary."""
    params, inputs = _mlp_data()
    params["l1"]["steps"] = np.array([3])
    report = gradprobe.probe(mlp_forward, lambda p, i: mlp_backward(p, i, input_grad=lambda d, W: d @ W),
                             params, inputs)
    assert "the gradient l2 passes back" in report.tensor("l1.b").hint


@pytest.mark.parametrize("batch_first", [False, True])
def test_one_step_of_a_batched_sequence(batch_first):
    """Steps of 2 sequences at once: each step's term has rank 2; batch-first puts the steps
    along axis 1. The bias, in the same step's upstream span, gets the same hint."""
    rng = np.random.default_rng(12)
    x = rng.normal(size=(5, 2, 6))  # steps, sequences, features
    deltas = rng.normal(size=(5, 2, 7))
    numeric = np.einsum("tbd,tbh->dh", x, deltas)
    analytic = x[0].T @ deltas[0]
    ctx = Context(inputs={"x": x.transpose(1, 0, 2) if batch_first else x})
    evidence = [_evidence(analytic, numeric, "Wx"),
                _evidence(deltas[0].sum(axis=0), deltas.sum(axis=(0, 1)), "b")]
    hints = diagnose(evidence, ctx)
    where = "item 0 (of 5) along axis 1 of x" if batch_first else "item 0 (of 5) of x"
    assert hints["Wx"] == hints["b"] and f"the term of {where}, not the sum" in hints["Wx"]


def test_a_middle_step_fits_no_loop():
    """A term from the middle of the sequence is neither an assignment nor a missing path."""
    rng = np.random.default_rng(14)
    x, deltas = rng.normal(size=(5, 4)), rng.normal(size=(5, 3))
    evidence = _evidence(np.outer(x[2], deltas[2]), x.T @ deltas, "Wx")
    assert diagnose([evidence], Context(inputs={"x": x})) == {}
