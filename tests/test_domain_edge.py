"""Steps that meet a domain edge (a log's 0, a pole) keep shrinking down to x's resolution."""

from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest

import gradprobe


@pytest.mark.filterwarnings("ignore:invalid value encountered in log:RuntimeWarning")
def test_a_log_whose_domain_edge_is_a_million_ulps_away_does_not_stop_the_check():
    """Regression (steep-64): log(x - c) with c 1e-13 below x = 7.4e-4 (about a million ulps of x):
    the default steps cross the edge; they must keep shrinking to x's resolution, not end the
    check with exit 2. d/dx log(x - c) = 1/(x - c) (the natural logarithm's derivative, A&S chapter 4.1; entry
    number from memory not given), evaluated
    exactly here with mpmath."""
    x = np.array([7.4e-4, 0.5])
    c = np.array([x[0] - 1e-13, 0.25])
    truth = np.array([float(1 / (mp.mpf(float(a)) - mp.mpf(float(b)))) for a, b in zip(x, c)])
    report = gradprobe.probe(lambda p, i: np.sum(np.log(p["x"] - i["c"])),
                             lambda p, i: {"x": truth.copy()}, {"x": x}, {"c": c})
    assert report.tensor("x").status != "fail"
