"""Kinks at the point and inside the step are told apart from bugs and from curvature."""

from __future__ import annotations

import numpy as np
import pytest
from probe_kit import make_probe

from gradprobe import probe, render_text


def _abs_case(w, c, analytic):
    return probe(
        lambda p, i: float(np.sum(np.abs(p["w"] - i["c"]))),
        lambda p, i: {"w": analytic(p["w"] - i["c"])},
        {"w": w}, {"c": c},
    )


def test_kink_exactly_at_the_point_with_a_subgradient_is_a_kink():
    """|w - c| at w = c: any analytic value in [-1, 1] is a valid subgradient."""
    w = np.array([0.7, -0.2, 1.5])
    c = np.array([0.7, 0.4, -1.0])  # coordinate 0 sits on the kink
    for pick in (0.0, 1.0, -1.0, 0.5):
        report = _abs_case(w, c, lambda r, pick=pick: np.where(r == 0, pick, np.sign(r)))
        t = report.tensor("w")
        assert report.ok and t.status == "kink" and t.kink_indices == ((0,),), pick


def test_analytic_outside_the_one_sided_slopes_at_a_kink_is_never_passed_or_failed_there():
    """|w - c| at its kink with 3.0 returned: outside the sides (-1, 1), yet the value several
    kinks meeting at the point beside a smooth part could give (3h - 2 max(h, 0) + 4 max(-h, 0)
    is |h|, and its conventional derivative at 0 is 3): never a pass, and not failed on this
    evidence; at the points moved off the kink the code's gradient is the loss's, so the
    second look calls it a kink. A wrong value away from the kink still fails."""
    w = np.array([0.7, -0.2])
    c = np.array([0.7, 0.4])
    report = _abs_case(w, c, lambda r: np.where(r == 0, 3.0, np.sign(r)))
    t = report.tensor("w")
    assert t.status == "kink" and t.bad_indices == () and t.kink_indices == ((0,),)
    wrong = _abs_case(w, c, lambda r: np.where(r == 0, 3.0, 2.0 * np.sign(r)))
    assert not wrong.ok and (1,) in wrong.tensor("w").bad_indices


@pytest.mark.parametrize("fraction", [0.05, 0.2, 1.0 / 3.0, 0.5, 0.6, 0.8, 0.95])
def test_kink_inside_the_step_is_near_not_at_the_point(fraction):
    """The kink sits a fraction of the first step away from the point: steps far below the
    distance resolve the derivative there, so the coordinate passes (sign(w - c) is exact)
    and a wrong value there still fails."""
    w = np.array([0.9, 2.0])
    probe = make_probe(np.sum, w)
    h = probe.prior_steps(np.arange(1))[0]
    c = np.array([0.9 - fraction * h, 0.0])
    report = _abs_case(w, c, np.sign)
    t = report.tensor("w")
    assert report.ok, render_text(report)
    assert t.status == "pass" and t.kink_indices == ()
    wrong = _abs_case(w, c, lambda r: -np.sign(r))
    assert wrong.tensor("w").bad_indices == ((0,), (1,))


def test_relu_at_zero_is_a_kink():
    w = np.array([0.0, 0.5, -0.5])
    report = probe(lambda p, i: float(np.sum(3.0 * np.maximum(p["w"], 0))),
                   lambda p, i: {"w": 3.0 * (p["w"] > 0)}, {"w": w})
    assert report.ok and report.tensor("w").kink_indices == ((0,),)


def _max_of_two(backward):
    return probe(lambda p, i: float(np.max(p["w"])), backward, {"w": np.array([1.25, 1.25])})


def test_max_tie_is_a_kink():
    """max(a, b) with a == b: the derivative picks one side (the first maximum, as
    np.argmax does: common practice)."""
    report = _max_of_two(lambda p, i: {"w": np.eye(2)[np.argmax(p["w"])]})
    assert report.ok and report.tensor("w").status == "kink", render_text(report)


def test_a_backward_right_only_at_the_tie_fails_off_it():
    """The value at the tie is a valid one, but the code returns it wherever the point is:
    moved off the tie, one of its elements is wrong (d max(a, b)/db = 1 where b > a)."""
    report = _max_of_two(lambda p, i: {"w": np.array([1.0, 0.0])})
    t = report.tensor("w")
    assert t.status == "fail", render_text(report)
    assert all("moved off the kinks" in (d.reason or "") for d in t.details if d.status == "fail")


def test_curvature_is_not_mistaken_for_a_kink():
    """w**2 at 0 has one-sided slopes -h and +h: they halve with the step, so no kink."""
    w = np.array([0.0, 1.0, -0.3])
    report = probe(lambda p, i: float(np.sum(p["w"] ** 2)), lambda p, i: {"w": 2 * p["w"]}, {"w": w})
    assert report.ok and report.tensor("w").status == "pass"
    steep = probe(lambda p, i: float(np.sum(np.exp(30 * p["w"]))),
                  lambda p, i: {"w": 30 * np.exp(30 * p["w"])}, {"w": w / 10})
    assert steep.ok and steep.tensor("w").status == "pass"
