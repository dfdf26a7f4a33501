"""Coordinates settled on the levels their steps climbed through keep real bounds.

A loss with a large constant term rounds far above a hundredth of the tolerance at the first
step, so its coordinates climb; where the levels settle one, the estimate must lie within its
bound of the true derivative, and a gradient off by more than the threshold must never
settle. Reference: mpmath.diff at 50 digits (as in test_estimates.py), and d/dx tanh(x) =
1 - tanh(x)**2 (tables of derivatives, e.g. Abramowitz & Stegun 4.5.80).
"""

from __future__ import annotations

import itertools

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe

import gradprobe.engine.coordinates as coordinates
from gradprobe.common.status import FAIL, PASS
from gradprobe.engine.climbed import settled_on_levels
from gradprobe.engine.coordinates import check_coordinates
from gradprobe.engine.steps import start_steps

from test_estimates import SHAPES  # the same five curves, numpy and mpmath

mpmath.mp.dps = 50

UNITS = np.array([-1.7, -0.3, 0.05, 0.9, 2.4])  # points, in units of the bend's scale s


def _on_levels(loss, points, analytic):
    """What the levels settle for ``points`` (first pairs, then the climb as the central
    path takes them), their estimates, and the forward calls the levels themselves spend (a
    short climb's one more pair)."""
    probe = make_probe(loss, points, analytic)
    flat = np.arange(points.size)
    h = probe.prior_steps(flat)
    first = probe.pairs(flat, h)
    taken = [(flat, h, first)]
    start = start_steps(probe, flat, first, h, taken)
    before = probe.evaluator.count
    settled = settled_on_levels(probe, flat, h, start, taken, np.zeros(flat.size, dtype=bool))
    return settled, probe.evaluator.count - before


def _levels_of(loss, points, analytic):
    return _on_levels(loss, points, analytic)[0]


def _spent_on_levels(loss, points, analytic):
    return _on_levels(loss, points, analytic)[1]


def _case(name, s, offset):
    g, mp_g = SHAPES[name]
    points = UNITS * s
    ref = np.array([float(mpmath.diff(lambda t: mp_g(t / s), mpmath.mpf(float(x)))) for x in points])
    return (lambda w: float(np.sum(g(w / s)) + offset)), points, ref


def test_settled_estimates_lie_within_their_bounds_of_mpmath():
    settled, misses = 0, []
    for name, s, offset in itertools.product(sorted(SHAPES), [1.0, 1e2], [1e2, 1e4]):
        loss, points, ref = _case(name, s, offset)
        passed, est = _levels_of(loss, points, ref)
        settled += int(passed.sum())
        bad = passed & ~(np.abs(est.value - ref) <= est.error)
        misses += [(name, s, offset, float(x)) for x in points[bad]]
    assert not misses, misses[:10]
    assert settled >= 20  # the levels do settle coordinates here (30 of 100 when written)


@pytest.mark.parametrize("rel", [1.5e-6, -3e-6])
def test_a_gradient_off_by_more_than_the_threshold_never_settles_nor_passes(rel):
    failed = checked = 0
    for name, s, offset in itertools.product(sorted(SHAPES), [1.0, 1e2], [1e2, 1e4]):
        loss, points, ref = _case(name, s, offset)
        wrong = ref * (1 + rel)
        passed, _ = _levels_of(loss, points, wrong)
        assert not passed.any(), (name, s, offset)
        out = check_coordinates(make_probe(loss, points, wrong), np.arange(points.size))
        assert not np.any(out.status == PASS), (name, s, offset, out.status.tolist())
        failed += int(np.sum(out.status == FAIL))
        checked += points.size
    # Undecided only where the loss's rounding hides even the ladders' steps (a gradient
    # of 2e-4 under a loss of 1e4 at 1.5 thresholds off).
    assert failed >= checked - 2, (failed, checked)


def test_a_kink_among_the_levels_is_left_to_the_ladder():
    """|w - k| with k 40 first steps (2**-17) to the right of each point, its slope jump 2%
    of the smooth part's: the levels above the kink see the one-sided gap jump, so nothing
    settles there; the ladders below it pass the slope on the point's side."""
    points = np.array([-1.7, -0.3, 0.05, 0.9, 2.4])
    slope = 1 - np.tanh(points) ** 2  # Abramowitz & Stegun 4.5.80
    jump = 0.02 * float(np.mean(slope))
    kinks = points + 40 * 2.0**-17

    def loss(w):
        return float(np.sum(np.tanh(w)) + 1e4 + jump * np.sum(np.abs(w - kinks)))

    analytic = slope - jump  # left of each kink |w - k| falls with slope -1
    passed, _ = _levels_of(loss, points, analytic)
    assert not passed.any()
    out = check_coordinates(make_probe(loss, points, analytic), np.arange(points.size))
    assert np.all(out.status == PASS), out.status.tolist()


def test_correct_values_pass_with_fewer_evaluations_than_ladders_alone(monkeypatch):
    """The same verdicts with and without the levels; the levels spare ladders."""
    counts = {}
    for levels in (True, False):
        if not levels:
            monkeypatch.setattr(coordinates, "settled_on_levels",
                                lambda probe, flat, *rest: (np.zeros(flat.size, dtype=bool), None))
        spent = 0
        for name, s in itertools.product(sorted(SHAPES), [1.0, 1e2]):
            loss, points, ref = _case(name, s, 1e4)
            out = check_coordinates(make_probe(loss, points, ref), np.arange(points.size))
            assert np.all(out.status == PASS), (name, s, levels, out.status.tolist())
            assert np.all(np.abs(out.numeric - ref) <= out.error_estimate), (name, s, levels)
            spent += out.evaluations
        counts[levels] = spent
    assert counts[True] < counts[False], counts


def test_no_pair_is_spent_on_levels_that_cannot_settle_a_wrong_gradient():
    """A climb one level short takes that level's pair only where the two levels it has
    already agree with the analytic value within the tolerance: a gradient 0.1% off (a
    thousand thresholds) never costs it, a right one does somewhere."""
    spent = {}
    for rel in (0.0, 1e-3):
        spent[rel] = 0
        for name, s in itertools.product(sorted(SHAPES), [1.0, 1e2]):
            loss, points, ref = _case(name, s, 1e2)
            spent[rel] += _spent_on_levels(loss, points, ref * (1 + rel))
    assert spent[1e-3] == 0 and spent[0.0] > 0, spent
