"""Hints on purpose-made buggy targets, none on random errors, no correct tensor failed."""

from __future__ import annotations

import numpy as np
import pytest
from bugzoo import CASES, Tally

from gradprobe import probe, render_text
from gradprobe.hints import Context as HintContext
from gradprobe.hints import Evidence, diagnose, hint_for


@pytest.mark.parametrize("make", CASES, ids=lambda make: make.__name__)
def test_each_case_gets_its_hint_and_nothing_else_fails(make):
    case = make()
    report = probe(case.forward, case.backward, case.params, case.inputs)
    tally = Tally()
    tally.add(case, report)
    assert tally.lines == [], render_text(report)
    assert report.ok == (not case.expect)


def test_the_whole_set_scores_clean():
    """At least 20 targets: every failure with a hint has the right one; no false failure."""
    tally = Tally()
    for make in CASES:
        case = make()
        tally.add(case, probe(case.forward, case.backward, case.params, case.inputs))
    assert len(CASES) >= 20
    assert tally.wrong_hint == 0 and tally.false_failures == 0 and tally.missed == 0
    assert tally.no_hint == 0 and tally.silent == 2 and tally.right_hint == 16


def _evidence(analytic, numeric, name="w"):
    shape = np.shape(analytic)
    analytic = np.asarray(analytic, dtype=float).reshape(-1)
    numeric = np.asarray(numeric, dtype=float).reshape(-1)
    rel = np.abs(analytic - numeric) / np.maximum(np.maximum(np.abs(analytic), np.abs(numeric)), 1e-12)
    return Evidence(name, tuple(shape), np.arange(analytic.size), analytic, numeric, rel > 1e-6)


@pytest.mark.parametrize("seed", range(60))
def test_random_errors_get_no_hint(seed):
    """A gradient with random errors on random elements fits no model of a bug."""
    rng = np.random.default_rng(seed)
    numeric = rng.normal(size=(6, 6)) if seed % 2 else rng.normal(size=36)
    analytic = numeric.copy()
    k = rng.integers(1, 36)
    where = rng.choice(36, size=k, replace=False)
    analytic.reshape(-1)[where] += rng.normal(scale=rng.uniform(0.01, 2.0), size=k)
    assert hint_for(_evidence(analytic, numeric), HintContext(batch_sizes=(16,))) is None


def test_symmetric_tensor_is_not_called_transposed():
    """For a symmetric gradient, transposing explains nothing: the factor rule speaks instead."""
    m = np.array([[1.0, 2.0], [2.0, 3.0]])
    hint = hint_for(_evidence(3 * m, m), HintContext())
    assert hint is not None and "transposed" not in hint and "3 x numeric" in hint


def test_unnamed_factor_is_stated():
    n = np.linspace(1, 2, 5)
    assert hint_for(_evidence(3.7 * n, n), HintContext()) == (
        "analytic is 3.7 x numeric everywhere: a constant factor is wrong")


def test_one_zero_coordinate_is_singular():
    n = np.linspace(1, 2, 5)
    a = n.copy()
    a[2] = 0.0
    assert hint_for(_evidence(a, n), HintContext()) == (
        "analytic is zero at 1 coordinate where the numeric gradient is not: a term is missing "
        "from backward there, or a mask zeroes it")


GOLDEN = {
    ("sign_flipped", "dense.W"): "analytic is -1 x numeric: the sign is flipped",
    ("half_not_carried", "dense.b"):
        "analytic is 2 x numeric: a factor 2 too many, as when forward halves a square "
        "(0.5 * r**2) and backward keeps the 2 of its derivative",
    ("factor_two_missing", "dense.W"):
        "analytic is 0.5 x numeric: a factor 2 is missing, as when the derivative of r**2 is "
        "taken as r",
    ("batch_mean_not_divided", "dense.W"):
        "analytic is 16 x numeric, the batch size: forward averages over the batch but backward "
        "does not divide by it",
    ("batch_divided_but_summed", "dense.b"):
        "analytic is 1/16 x numeric, one over the batch size: backward divides by the batch size "
        "where forward sums, or divides twice",
    ("transposed_weight", "dense.W"):
        "analytic is the numeric gradient transposed: a transpose is missing or extra "
        "(x.T @ d versus d.T @ x)",
    ("bias_gradient_zero", "dense.b"):
        "analytic is zero everywhere while the numeric gradient is not: backward never fills "
        "this gradient in, or cuts every path to it",
    ("input_gradient_first_row_only", "x"):
        "right only in row 0 and zero elsewhere: either a loop or sum over axis 0 is missing, so "
        "backward handles one item only, or the gradient is not carried back from that item to "
        "the others (a missing path back through time)",
    ("swapped_gradients", "dec.C"): "the gradients of enc.A and dec.C look swapped",
    ("embedding_assigned", "table"):
        "wrong exactly at the rows that idx uses more than once and right where it uses them "
        "once: gradients are assigned instead of accumulated there (use np.add.at, or += in a loop)",
}


@pytest.mark.parametrize("key", list(GOLDEN), ids=lambda key: f"{key[0]}-{key[1]}")
def test_golden_sentences(key):
    case = next(m for m in CASES if m.__name__ == key[0])()
    report = probe(case.forward, case.backward, case.params, case.inputs)
    assert report.tensor(key[1]).hint == GOLDEN[key]


def test_a_slice_in_the_middle_names_the_missing_loop_alone():
    n = np.arange(1.0, 16.0).reshape(5, 3)
    a = np.zeros_like(n)
    a[2] = n[2]
    assert hint_for(_evidence(a, n), HintContext()) == (
        "right only in row 2 and zero elsewhere: a loop or sum over axis 0 is missing, so "
        "backward handles one item only")


def test_a_slice_right_but_the_rest_wrong_and_nonzero_gets_no_hint():
    """The other rows were computed, just wrongly (as without a path back through time with
    a loss at every step): a missing loop does not fit."""
    n = np.arange(1.0, 16.0).reshape(5, 3)
    a = n * 0.7
    a[4] = n[4]
    assert hint_for(_evidence(a, n), HintContext()) is None


def test_swapped_needs_both_directions():
    a = np.arange(1.0, 5.0)
    b = np.arange(5.0, 9.0)
    one_way = [_evidence(b, a, name="p"), _evidence(b, b + 1, name="q")]
    assert "swapped" not in " ".join(diagnose(one_way, HintContext()).values())
    both = [_evidence(b, a, name="p"), _evidence(a, b, name="q")]
    assert diagnose(both, HintContext()) == {
        "p": "the gradients of p and q look swapped", "q": "the gradients of p and q look swapped"}


@pytest.mark.parametrize("seed", range(20))
def test_a_small_unrelated_analytic_is_no_constant_factor(seed):
    """An analytic gradient that is a few percent of the numeric one and unrelated to it (a
    weight decay term left out) has a least-squares ratio to it, but no factor holds element
    by element: no hint."""
    rng = np.random.default_rng(seed)
    numeric = rng.normal(size=(5, 5))
    analytic = rng.uniform(0.005, 0.05) * rng.normal(size=(5, 5))
    assert hint_for(_evidence(analytic, numeric), HintContext(batch_sizes=(16,))) is None


def test_a_factor_that_fits_on_average_but_not_on_one_element_is_no_factor():
    """2 x numeric on every element but one, which is 1.5 times that: the fit over the whole
    tensor leaves well under 5% unexplained, the element itself does not fit."""
    n = np.linspace(1.0, 20.0, 20)
    a = 2.0 * n
    a[0] *= 1.5
    assert hint_for(_evidence(a, n), HintContext()) is None


def test_a_factor_survives_the_numeric_estimates_own_error():
    """Every element 2 x numeric up to a relative 1e-7 of estimation error: the factor is named."""
    rng = np.random.default_rng(3)
    n = rng.normal(size=30)
    a = 2.0 * n * (1.0 + 1e-7 * rng.normal(size=30))
    assert hint_for(_evidence(a, n), HintContext()).startswith("analytic is 2 x numeric")


def test_a_transpose_that_fits_on_average_but_not_on_one_element_is_no_transpose():
    rng = np.random.default_rng(4)
    n = rng.normal(size=(6, 6))
    a = n.T.copy()
    a[0, 1] += 0.3 * abs(a[0, 1] - n[0, 1]) + 0.3
    assert hint_for(_evidence(a, n), HintContext()) is None


def test_swapped_needs_every_element_to_fit():
    rng = np.random.default_rng(5)
    a, b = rng.normal(size=12), rng.normal(size=12)
    b[3] = a[3] + 0.01  # an element where the two gradients nearly agree
    off = b.copy()
    off[3] += 0.1  # p's analytic there is b's value off by ten times the gap: no exchange
    pair = [_evidence(off, a, name="p"), _evidence(a, b, name="q")]
    assert "swapped" not in " ".join(diagnose(pair, HintContext()).values())


def test_a_ratio_that_is_not_steady_is_no_factor_however_small_the_values():
    """Analytic values 1e-4 of the numeric scale and unrelated to them: each element's residual
    is far below its discrepancy, yet the ratio analytic / numeric wanders from element to
    element, so no factor is named."""
    rng = np.random.default_rng(6)
    numeric = rng.choice([-1.0, 1.0], size=40) * rng.uniform(0.5, 2.0, size=40)
    analytic = 1e-4 * rng.normal(size=40)
    assert hint_for(_evidence(analytic, numeric), HintContext()) is None
