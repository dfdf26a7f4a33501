"""float32 code whose rounding puts one absolute residual exactly at its kink, where the
float64 run at the same float32 values sits 1.7e-9 beside it.

The float64 run's one-sided derivatives along that bias are the kink's two sides, and a
correct float32 gradient (|u|'(0) = 0) lies between them. The float32 backward varies between
points a few units apart by the kink's whole jump (the residual flips between 0 and either
sign), so that variation is not rounding: a float32 gradient outside the sides, whose float64
run hides the bug (there the residuals' signs cancel and the flipped sign gives 0 again),
fails (property case bug-sign-61003).

References: d|u|/du = sign(u), with 0 at u = 0 as the subgradient convention (table of
derivatives; common practice); the one-sided derivatives of the same loss from mpmath at 40
digits, at the float32 values.
"""

from __future__ import annotations

import mpmath
import numpy as np

from gradprobe import probe

mpmath.mp.dps = 40

# Crop yields of four fields (rows) for two crops (columns), a linear model of three soil
# readings; crop 1's first field recorded exactly as predicted in float32.
RNG = np.random.default_rng(0)
X = (RNG.normal(size=(4, 3)) * 3).astype(np.float32)
W = (RNG.normal(size=(3, 2)) * 0.1).astype(np.float32)
B = (RNG.normal(size=2) * 0.1).astype(np.float32)
PRED = X @ W + B
Y = (PRED + np.float32(0.05) * np.array([[1, 0], [-1, 1], [1, -1], [-1, 1]], dtype=np.float32)).astype(np.float32)
Y[0, 1] = PRED[0, 1]
C = np.float32(2845.96)


def _forward(p, i):
    r = i["x"] @ p["W"] + p["b"] - i["y"]
    return C * np.mean(np.sum(np.abs(r), axis=0))


def _backward(p, i):
    r = i["x"] @ p["W"] + p["b"] - i["y"]
    g = C * np.sign(r) / r.shape[1]
    return {"W": i["x"].T @ g, "b": g.sum(axis=0)}


def _flipped(p, i):  # the planted bug: the bias gradient's sign
    g = _backward(p, i)
    return {"W": g["W"], "b": -g["b"]}


PARAMS, INPUTS = {"W": W, "b": B}, {"x": X, "y": Y}


def _along_b1(t):
    total = mpmath.mpf(0)
    for row in range(4):
        for col in range(2):
            m = sum(mpmath.mpf(float(X[row, k])) * mpmath.mpf(float(W[k, col])) for k in range(3))
            m += t if col == 1 else mpmath.mpf(float(B[0]))
            total += abs(m - mpmath.mpf(float(Y[row, col])))
    return mpmath.mpf(float(C)) * total / 2


def test_the_setup_by_mpmath():
    """In float32 the residual is exactly 0; at the same values in exact arithmetic it is
    1.7e-9 off, the one-sided slopes along b[1] differ by the kink's jump 2 C / 2, and the
    correct float32 value lies between them while the flipped one does not."""
    assert (X @ W + B - Y)[0, 1] == 0.0
    b1, h = mpmath.mpf(float(B[1])), mpmath.mpf("1e-5")  # the loss is linear between kinks
    assert _along_b1(b1 + h) - _along_b1(b1) != _along_b1(b1) - _along_b1(b1 - h)
    right = float((_along_b1(b1 + h) - _along_b1(b1)) / h)  # across the kink 1.7e-9 away:
    left = float((_along_b1(b1) - _along_b1(b1 - h)) / h)  # within 2846 * 1.7e-9 / h = 0.5
    assert abs(abs(right - left) - float(C)) < 1.0
    low, high = min(left, right), max(left, right)
    good, bad = _backward(PARAMS, INPUTS)["b"][1], _flipped(PARAMS, INPUTS)["b"][1]
    assert low - 1.0 <= good <= high + 1.0
    assert not low - 100.0 <= bad <= high + 100.0


def test_a_correct_float32_gradient_at_the_kink_is_a_kink():
    report = probe(_forward, _backward, PARAMS, INPUTS)
    assert [t.status for t in report.tensors] == ["kink", "kink"]


def test_a_flipped_float32_gradient_off_the_kinks_sides_fails():
    t = probe(_forward, _flipped, PARAMS, INPUTS).tensor("b")
    assert t.status == "fail"
    assert (1,) in t.bad_indices
