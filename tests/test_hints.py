"""Hints on purpose-made buggy targets, none on random errors, no correct tensor failed."""

from __future__ import annotations

import numpy as np
import pytest
from bugzoo import CASES, Tally

from gradprobe import probe, render_text
from gradprobe.diagnose import Evidence, HintContext, diagnose, hint_for


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
    assert tally.right_hint >= 15


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


def test_swapped_needs_both_directions():
    a = np.arange(1.0, 5.0)
    b = np.arange(5.0, 9.0)
    one_way = [_evidence(b, a, name="p"), _evidence(b, b + 1, name="q")]
    assert "swapped" not in " ".join(diagnose(one_way, HintContext()).values())
    both = [_evidence(b, a, name="p"), _evidence(a, b, name="q")]
    assert diagnose(both, HintContext()) == {
        "p": "the gradients of p and q look swapped", "q": "the gradients of p and q look swapped"}
