"""The error bounds of extrapolated estimates hold against mpmath over many decades.

Reference: mpmath.diff at 50 digits. Each function is sum(c * g(w / s)): s sets the scale
on which the loss bends along a coordinate, c the size of the loss; both span decades, and
so do the points. A bound that fails here would let a correct backward fail a check.
"""

from __future__ import annotations

import itertools

import mpmath
import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe.engine.coordinates import check_coordinates
from gradprobe.engine.refine import climb
from gradprobe.common.status import FAIL, PASS

mpmath.mp.dps = 50

SHAPES = {
    # name: (numpy g, mpmath g)
    "exp_sin": (lambda z: np.exp(np.sin(z)), lambda z: mpmath.exp(mpmath.sin(z))),
    "log1p_sq": (lambda z: np.log1p(z**2), lambda z: mpmath.log(1 + z**2)),
    "tanh": (np.tanh, mpmath.tanh),
    "softplus": (lambda z: np.logaddexp(0.0, 3 * z), lambda z: mpmath.log(1 + mpmath.exp(3 * z))),
    "inverse": (lambda z: 1.0 / (1.0 + z**2), lambda z: 1 / (1 + z**2)),
}
BENDS = [1e-3, 1e-1, 1.0, 1e2]  # s
SIZES = [1e-6, 1.0, 1e6]  # c
UNITS = np.array([-1.7, -0.3, 0.05, 0.9, 2.4])  # points, in units of s


def _reference(g, c, s, x):
    return float(mpmath.diff(lambda t: c * g(t / s), mpmath.mpf(float(x))))


@pytest.mark.parametrize("name", sorted(SHAPES))
def test_ladder_bounds_hold_from_any_step_below_the_bend(name):
    """From the usual step down to 2**-12 of it, the bound covers the true error, also
    where the loss bends on a scale of a thousandth (the usual step is then 0.6% of it)."""
    g, mp_g = SHAPES[name]
    misses = []
    for s, c in itertools.product(BENDS, SIZES):
        points = UNITS * s
        probe = make_probe(lambda w: np.sum(c * g(w / s)), points)
        ref = np.array([_reference(mp_g, c, s, x) for x in probe.x])
        flat = np.arange(points.size)
        for shift in (-12, -8, -4, -2, 0):
            est = climb(probe, flat, probe.prior_steps(flat) * 2.0**shift).central
            bad = np.abs(est.value - ref) > est.error
            misses += [(s, c, shift, float(x)) for x in probe.x[bad]]
    assert not misses, misses[:10]


OFFSETS = [0.0, 100.0]  # points near 0 in units of s, and far from it (|x| >> s)


def _case(name, s, c, offset):
    g, mp_g = SHAPES[name]
    points = (UNITS + offset) * s
    ref = np.array([_reference(mp_g, c, s, x) for x in points])
    return (lambda w: np.sum(c * g(w / s))), points, ref


@pytest.mark.parametrize("name", sorted(SHAPES))
def test_correct_values_pass_over_decades_of_scale(name):
    """mpmath's derivative as the analytic value: every coordinate passes, none is left
    inconclusive, and the reported numeric value is within its bound of the reference."""
    problems = []
    for s, c, offset in itertools.product([1e-4, 1e-2, 1.0, 1e2], SIZES, OFFSETS):
        loss, points, ref = _case(name, s, c, offset)
        probe = make_probe(loss, points, ref)
        out = check_coordinates(probe, np.arange(points.size))
        if np.any(out.status != PASS):
            problems.append((s, c, offset, out.status.tolist(), out.rel.max()))
        if np.any(np.abs(out.numeric - ref) > np.maximum(out.error_estimate, 1e-6 * out.scale)):
            problems.append((s, c, offset, "bound"))
    assert not problems, problems[:5]


@pytest.mark.parametrize("name", sorted(SHAPES))
def test_a_one_percent_error_fails_over_decades_of_scale(name):
    for s, c, offset in itertools.product([1e-4, 1e-2, 1.0, 1e2], SIZES, OFFSETS):
        loss, points, ref = _case(name, s, c, offset)
        out = check_coordinates(make_probe(loss, points, 1.01 * ref), np.arange(points.size))
        wrong = ref != 0  # tanh saturates: its derivative is 0 even at 50 digits there
        assert np.all(out.status[wrong] == FAIL), (s, c, offset, out.status.tolist())


@pytest.mark.parametrize("rows", [3, 4, 5])
def test_quotients_that_agree_by_a_coincidence_of_orders_are_not_trusted(rows):
    """Central quotients Q(h) = D + c2 h**2 + c4 h**4 (the expansion Richardson's tableau
    assumes, common practice) with c2 = -c4 (h0**2 + h1**2): the first two rows agree exactly,
    though neither is D. The bound of whatever the tableau returns must cover its distance
    from D once a smaller step shows the quotients moving."""
    from gradprobe.engine.ladder import tableau

    d, c4, h0 = 1.3335, 40.0, 2.0**-7
    steps = h0 / 2.0 ** np.arange(rows)
    c2 = -c4 * (steps[0] ** 2 + steps[1] ** 2)
    q = (d + c2 * steps**2 + c4 * steps**4)[:, None]
    est = tableau(q, np.full_like(q, 1e-16), 2.0, 2)
    assert q[0, 0] == pytest.approx(q[1, 0], rel=1e-15, abs=0)
    assert abs(est.value[0] - d) <= est.error[0]
