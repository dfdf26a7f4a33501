"""A coordinate that moves the loss only at the loss's rounding level, at every step taken,
is no evidence against a slope that predicts far more: the steps may have left the range
where the loss is linear in it.

Case steep-65101 of the independent generator: sin(a0 (p0 - k0)) with a0 near 1e6 beside
exp terms that put the loss at 4.9e15 (its last place is 1), so p0's terms, bounded by 1.2,
move the loss by one unit in its last place at most however far the steps go. Its judge
differentiates the target with mpmath (50 digits): p0's analytic gradient is right, p1 carries
the planted bug.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from adversarial import judge  # noqa: E402


def test_a_correct_slope_read_off_a_loss_moved_by_rounding_alone_is_not_failed():
    outcome = judge("steep", 65101)
    assert not outcome["false_alarm"], outcome["status"]
    assert outcome["status"]["p0"] != "fail"
    assert outcome["status"]["p1"] == "fail" and outcome["found"]  # the planted bug still fails


def test_sines_a_few_roundings_high_beside_huge_losses_are_not_failed():
    """steep-72373 (a sine of amplitude 0.32, six values' rounding, beside exp terms at 3e13)
    and steep-73224 (amplitude about two values' rounding beside 4e12): the loss moves by no
    more at steps of 1e-4 or 3e-2 than at 1e-6, while the correct slopes (7e5, 2e3) predict
    1,400 and 7,000 roundings at the widest step. Reference: the generator's mpmath judge."""
    for seed in (72373, 73224):
        outcome = judge("steep", seed)
        assert not outcome["false_alarm"], (seed, outcome["status"])


def _huge_loss_beside(term, slope):
    """A loss of 4e12 (last place 2**-10) plus ``term`` of one param, with ``slope`` as its
    gradient."""
    import numpy as np

    base = np.array([4.0e12, 1.5e12])

    def forward(p, i):
        return float(np.sum(base * np.exp(i["scale"] * p["level"])) + term(float(p["x"][0])))

    def backward(p, i):
        return {"level": base * i["scale"] * np.exp(i["scale"] * p["level"]),
                "x": np.array([slope(float(p["x"][0]))])}

    params = {"level": np.array([0.0, 0.0]), "x": np.array([0.3])}
    return forward, backward, params, {"scale": np.array([1e-3, 2e-3])}


def test_a_wrong_slope_that_moves_the_loss_in_proportion_to_the_step_still_fails():
    """50 x beside the huge loss, backward 60 (20% off; d/dx (c x) = c, a table's first entry):
    the loss moves by 50 h, in proportion to the step and far beyond its rounding at the
    ladder's steps, so the growth shows and the failure stands."""
    from gradprobe import probe

    forward, backward, params, inputs = _huge_loss_beside(lambda x: 50.0 * x, lambda x: 60.0)
    assert probe(forward, backward, params, inputs).tensor("x").status.value == "fail"


def test_a_steep_sine_at_the_rounding_level_is_not_failed():
    """A sin(a x) with A = 2e-3 (two places of the loss's last digit) and a = 1e7 beside the
    huge loss, backward A a cos(a x) (d/dx sin(a x) = a cos(a x), a table's entry): no step
    rounding allows resolves the sine, and the loss's moves stay bounded however far the steps
    go, so the correct slope (about 2e4) must not fail."""
    import math

    from gradprobe import probe

    amplitude, rate = 2e-3, 1e7
    forward, backward, params, inputs = _huge_loss_beside(
        lambda x: amplitude * math.sin(rate * x), lambda x: amplitude * rate * math.cos(rate * x))
    assert probe(forward, backward, params, inputs).tensor("x").status.value != "fail"


def test_a_steep_term_whose_whole_move_lies_below_the_rounding_is_not_failed():
    """w / (1 - a (x - k)) with 1 - a (x - k) = 0.0068 and a = -5.5e5 (a pole 1.2e-8 away)
    beside the huge loss: the term's slope at the point is w a / (1 - u)**2 (d/dx 1/v =
    -v'/v**2, a table's entry), 6e3 for w = 4e-7, yet the whole term is 6e-5 and moves the
    loss by less than its last place (2**-10) at every step short of the pole. The loss never
    moves; the correct slope must not fail on that (steep-270370, below, as first found)."""
    from gradprobe import probe

    a, gap, w, x0 = -5.5e5, 0.0068, 4e-7, 0.3
    k = x0 - (1 - gap) / a

    def term(x):
        return w / (1 - a * (x - k))

    def slope(x):
        return w * a / (1 - a * (x - k)) ** 2

    forward, backward, params, inputs = _huge_loss_beside(term, slope)
    assert probe(forward, backward, params, inputs).tensor("x").status.value != "fail"


def test_steep_270370_as_first_found_is_no_false_alarm():
    outcome = judge("steep", 270370)
    assert not outcome["false_alarm"], outcome["status"]


def test_a_gradient_for_a_param_the_loss_ignores_still_fails():
    """backward gives 0.5 for a param the forward never reads (beside a loss of 3): the slope
    would move the loss beyond its rounding at steps of 1e-15, a few spacings of x; the loss
    never moves, and the coordinate fails."""
    import numpy as np

    from gradprobe import probe

    def forward(p, i):
        return float(np.sum(i["t"] * p["w"] ** 2))

    def backward(p, i):
        return {"w": 2 * i["t"] * p["w"], "unused": np.full(2, 0.5)}

    params = {"w": np.array([0.7, -1.1]), "unused": np.array([0.0, 2.5])}
    report = probe(forward, backward, params, {"t": np.array([1.5, 0.9])})
    assert report.tensor("unused").status.value == "fail"
    assert report.tensor("w").status.value == "pass"
