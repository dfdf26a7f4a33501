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
