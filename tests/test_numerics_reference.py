"""Numeric derivatives against references outside the project.

- mpmath's arbitrary-precision differentiation (mpmath.diff at 50 digits);
- closed-form derivatives from Abramowitz & Stegun, Handbook of Mathematical Functions
  (1964), chapter 4 (equation numbers quoted from memory);
- sympy's symbolic derivatives.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
import sympy
from probe_kit import make_probe

from gradprobe import probe

mpmath.mp.dps = 50

SMOOTH = {
    # name: (numpy function, mpmath function)
    "exp_sin": (lambda w: np.exp(np.sin(w)), lambda t: mpmath.exp(mpmath.sin(t))),
    "log1p_sq": (lambda w: np.log1p(w**2), lambda t: mpmath.log(1 + t**2)),
    "cubic_cos": (lambda w: w**3 * np.cos(w), lambda t: t**3 * mpmath.cos(t)),
    "softplus": (lambda w: np.log1p(np.exp(3 * w)), lambda t: mpmath.log(1 + mpmath.exp(3 * t))),
}
POINTS = np.array([-1.7, -0.3, 0.05, 0.9, 2.4, 11.0])


def _numeric_slopes(fn, points):
    """Central differences of sum(fn(w)) at each coordinate of ``points``."""
    probe = make_probe(lambda w: np.sum(fn(w)), points)
    flat = np.arange(points.size)
    return probe.pairs(flat, probe.prior_steps(flat)).central


@pytest.mark.parametrize("name", sorted(SMOOTH))
def test_central_difference_matches_mpmath(name):
    """A central difference of a smooth float64 function is within 1e-7 of mpmath.diff."""
    fn, mp_fn = SMOOTH[name]
    numeric = _numeric_slopes(fn, POINTS)
    reference = np.array([float(mpmath.diff(mp_fn, mpmath.mpf(float(t)))) for t in POINTS])
    rel = np.abs(numeric - reference) / np.maximum(np.abs(reference), 1.0)
    assert rel.max() < 1e-7


# Abramowitz & Stegun chapter 4 (from memory): 4.3.110 d/dz sin z = cos z; 4.3.112
# d/dz tan z = sec^2 z; 4.4.52 d/dz arcsin z = (1 - z^2)^(-1/2); 4.4.54 d/dz arctan z =
# 1/(1 + z^2); 4.5.82 d/dz tanh z = sech^2 z.
TABLE = {
    "sin (A&S 4.3.110)": (np.sin, np.cos),
    "tan (A&S 4.3.112)": (np.tan, lambda z: 1.0 / np.cos(z) ** 2),
    "arcsin (A&S 4.4.52)": (np.arcsin, lambda z: 1.0 / np.sqrt(1.0 - z**2)),
    "arctan (A&S 4.4.54)": (np.arctan, lambda z: 1.0 / (1.0 + z**2)),
    "tanh (A&S 4.5.82)": (np.tanh, lambda z: 1.0 / np.cosh(z) ** 2),
}


@pytest.mark.parametrize("entry", sorted(TABLE))
def test_table_derivatives_pass_and_a_wrong_one_fails(entry):
    """A backward written from the table passes; the same backward scaled by 1.01 fails."""
    fn, dfn = TABLE[entry]
    w = np.array([-0.8, -0.2, 0.1, 0.45, 0.7])

    def forward(p, i):
        return float(np.sum(fn(p["w"])))

    good = probe(forward, lambda p, i: {"w": dfn(p["w"])}, {"w": w})
    assert good.ok and good.tensor("w").max_rel_error < 1e-8
    bad = probe(forward, lambda p, i: {"w": 1.01 * dfn(p["w"])}, {"w": w})
    assert not bad.ok and bad.tensor("w").failed == w.size


def test_symbolic_derivatives_from_sympy():
    """Gradients of a two-parameter logistic curve, derived by sympy, pass the check."""
    a, b, t = sympy.symbols("a b t")
    curve = 1 / (1 + sympy.exp(-a * (t - b)))
    da = sympy.lambdify((a, b, t), sympy.diff(curve, a), "numpy")
    db = sympy.lambdify((a, b, t), sympy.diff(curve, b), "numpy")
    times = np.linspace(-2.0, 3.0, 9)
    weights = np.linspace(0.5, 1.5, 9)

    def forward(p, i):
        return float(np.sum(i["wt"] / (1 + np.exp(-p["a"] * (i["t"] - p["b"])))))

    def backward(p, i):
        return {
            "a": np.array(np.sum(i["wt"] * da(p["a"], p["b"], i["t"]))),
            "b": np.array(np.sum(i["wt"] * db(p["a"], p["b"], i["t"]))),
        }

    params = {"a": np.array(1.3), "b": np.array(0.4)}
    report = probe(forward, backward, params, {"t": times, "wt": weights})
    assert report.ok
    assert max(t.max_rel_error for t in report.tensors) < 1e-8


def test_steps_are_exact_distances():
    """The divisor is the distance the perturbed values really moved (common practice)."""
    x = np.array([0.1, 1.0 / 3.0, 7.77, -123.456, 0.0])
    probe = make_probe(lambda w: np.sum(w), x)
    flat = np.arange(x.size)
    plus, minus, h_plus, h_minus = probe.moved(flat, probe.prior_steps(flat))
    assert np.array_equal(plus - x, h_plus)
    assert np.array_equal(x - minus, h_minus)
    assert np.all(h_plus > 0) and np.all(h_minus > 0)
