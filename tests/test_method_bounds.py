"""A coordinate fails only on a bound checked on it, whatever the method and options.

Targets: loss sum(c * sin(a (w - k))) over sensor phases w, whose derivative along w_i is
c a cos(a (w_i - k)) (table of derivatives: d/dz sin z = cos z, Abramowitz & Stegun 4.3.105,
from memory; with the chain rule). The closed form is checked against mpmath.diff at 40
digits before it is used.

- ``--no-recheck``: the first central difference's bound counts rounding only; where its
  truncation ((a h)**2 / 6 relative) is beyond the threshold, a correct gradient must not
  fail on it. A 1% error must still fail.
- ``--method richardson``: its ladder starts at 2**-7 max(1, |x|), far above the period of
  a sine with a = 2.315e5 (2.7e-5): every quotient aliases (each is the derivative times
  sin(a h) / (a h)), and at this a the three rows' changes happen to fit the tableau's
  model, so quotients that agree by chance must not fail a correct gradient, with or
  without --no-recheck. A 1% error must still fail.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe import probe

mpmath.mp.dps = 40

C = 0.7
K = 1.3e-6
CASES = {"steep": (5000.0, np.linspace(0.1, 0.9, 9)),  # (a, w): a h ~ 5e-3 at h ~ 1e-6
         "aliasing": (2.315e5, np.linspace(-1.2e-5, 1.4e-5, 9))}


def _target(a):
    def forward(p, i):
        return float(np.sum(C * np.sin(a * (p["w"] - K))))

    def backward(p, i):
        return {"w": C * a * np.cos(a * (p["w"] - K))}

    return forward, backward


@pytest.mark.parametrize("case", sorted(CASES))
def test_the_closed_form_is_mpmaths(case):
    a, w = CASES[case]
    g = _target(a)[1]({"w": w}, {})["w"]
    for k in range(w.size):
        ref = mpmath.diff(lambda t: C * mpmath.sin(a * (t - mpmath.mpf(K))), mpmath.mpf(float(w[k])))
        assert abs(g[k] - float(ref)) <= 1e-11 * C * a  # the argument a (w - k) carries a w eps


def _wrong(backward, k=4, factor=1.01):
    def wrong(p, i):
        g = backward(p, i)["w"].copy()
        g[k] *= factor
        return {"w": g}
    return wrong


@pytest.mark.parametrize(("case", "options"), [
    ("steep", {"recheck": False}),
    ("steep", {"recheck": False, "directions": 3}),
    ("aliasing", {"recheck": False}),
    ("aliasing", {"method": "richardson"}),
    ("aliasing", {"method": "richardson", "recheck": False}),
])
def test_a_correct_gradient_never_fails(case, options):
    a, w = CASES[case]
    forward, backward = _target(a)
    t = probe(forward, backward, {"w": w}, **options).tensor("w")
    assert t.failed == 0, (t.status, t.failed, t.inconclusive)


@pytest.mark.parametrize(("case", "options"), [
    ("steep", {"recheck": False}),
    ("aliasing", {"recheck": False}),
    ("aliasing", {"method": "richardson"}),
    ("aliasing", {"method": "richardson", "recheck": False}),
])
def test_one_element_one_percent_off_still_fails(case, options):
    a, w = CASES[case]
    forward, backward = _target(a)
    t = probe(forward, _wrong(backward), {"w": w}, **options).tensor("w")
    assert t.status == "fail" and t.failed == 1, (t.status, t.failed, t.inconclusive)
