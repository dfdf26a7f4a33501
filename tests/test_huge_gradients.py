"""Gradients beyond 1e154 (their squares overflow float64): a wrong element still fails and
correct code passes, without a RuntimeWarning of gradprobe's own on the console.

Reference: mpmath.diff at 40 digits of the same loss, sum(exp(c w)) over crop-growth rates w
(c = 600, so the loss is ~1e260 and each gradient ~1e263).
"""

from __future__ import annotations

import warnings

import mpmath
import numpy as np
import pytest

from gradprobe import probe

C = 600.0
W = np.array([0.995, 0.99, 0.998, 0.992, 1.0])  # gradients within a factor 400


def _forward(p, i):
    return float(np.sum(np.exp(C * p["w"])))


def _backward_off_at(k, factor):
    def backward(p, i):
        g = C * np.exp(C * p["w"])
        g[k] *= factor
        return {"w": g}
    return backward


def _mpmath_gradient():
    with mpmath.workdps(40):
        return np.array([float(mpmath.diff(lambda t: mpmath.exp(C * t), mpmath.mpf(float(x)))) for x in W])


def _checked(backward):
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        report = probe(_forward, backward, {"w": W.copy()})
    ours = [w for w in seen if "gradprobe" in str(w.filename)]
    assert not ours, [str(w.message) for w in ours]
    return report.tensor("w")


def test_the_closed_form_is_mpmaths_and_its_square_overflows():
    g = _backward_off_at(0, 1.0)({"w": W.copy()}, {})["w"]
    assert np.allclose(g, _mpmath_gradient(), rtol=1e-13, atol=0)
    with np.errstate(over="ignore"):
        assert not np.isfinite(np.float64(g.max()) ** 2)


def test_correct_huge_gradient_passes():
    assert _checked(_backward_off_at(0, 1.0)).status.value == "pass"


@pytest.mark.parametrize("k, factor", [(0, 1.01), (2, 1.5), (3, 0.999)])
def test_one_wrong_element_of_a_huge_gradient_fails_and_is_located(k, factor):
    truth = _mpmath_gradient()
    g = _backward_off_at(k, factor)({"w": W.copy()}, {})["w"]
    rel = np.abs(g - truth) / np.abs(truth)
    assert rel[k] > 5e-4 and np.all(np.delete(rel, k) < 1e-13)  # only element k is wrong
    t = _checked(_backward_off_at(k, factor))
    assert t.status.value == "fail"
    assert [tuple(i) for i in t.bad_indices] == [(k,)]


# -- params beyond float32's range (1e100, and 1e250 where the steps' squares overflow): the
# -- check for float32 code inside rounds nothing it cannot hold, and nothing prints a warning

V = np.array([0.4, -1.3, 2.2, 0.9])  # star masses, in units of S


def _scaled_forward(S):
    def forward(p, i):
        return float(np.sum(np.log1p((p["w"] / S) ** 2)))
    return forward


def _scaled_backward(S, off=1.0):
    def backward(p, i):
        u = p["w"] / S
        g = 2 * u / (1 + u * u) / S  # table: d/dx log(1 + x^2) = 2x / (1 + x^2), chain rule for x = w / S
        g[1] *= off
        return {"w": g}
    return backward


@pytest.mark.parametrize("S", [1e100, 1e250])
def test_the_scaled_closed_form_is_mpmaths(S):
    g = _scaled_backward(S)({"w": V * S}, {})["w"]
    with mpmath.workdps(40):
        ref = [float(mpmath.diff(lambda t: mpmath.log(1 + (t / mpmath.mpf(S)) ** 2), mpmath.mpf(float(x)),
                                 h=mpmath.mpf(S) * mpmath.mpf("1e-12"))) for x in V * S]
    assert np.allclose(g, ref, rtol=1e-13, atol=0)


@pytest.mark.parametrize("off, status", [(1.0, "pass"), (1.01, "fail")])
@pytest.mark.parametrize("S", [1e100, 1e250])
def test_params_beyond_float32s_range_are_judged_without_warnings(off, status, S):
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        t = probe(_scaled_forward(S), _scaled_backward(S, off), {"w": V * S}).tensor("w")
    assert [str(w.message) for w in seen if "gradprobe" in str(w.filename)] == []
    assert t.status.value == status
    if status == "fail":
        assert [tuple(i) for i in t.bad_indices] == [(1,)]
