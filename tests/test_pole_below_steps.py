"""A loss that does not change at any step the quotients take, yet does at a smaller one: a
pole closer to the point than every step, whose term stays within the loss's rounding
everywhere but right beside the pole, is not a param the loss ignores.

Case steep-86812 of the independent generator: 1/(1 - a1 (p1 - k1)) with a1 near -6e5 and
p1[1, 2] 4.9e-9 from the pole (p1[0, 1] 5e-8), beside exp terms that put the loss at 1.2e15
(its last place 0.25): the term is 0.026 (0.24 at [0, 1]) at the point, so steps that jump
the pole leave the loss as it was, while the correct slopes (-5.2e6, 4.7e6) predict some 150
places at the first step. Its judge differentiates the target with mpmath (50 digits).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from adversarial import judged_cleanly  # noqa: E402

from gradprobe import probe  # noqa: E402
from gradprobe.api import render_text  # noqa: E402


def test_a_correct_slope_beside_a_pole_closer_than_the_steps_is_not_failed():
    outcome = judged_cleanly("steep", 86812)
    assert outcome["expect"]["p1"] == "quiet"
    assert not outcome["false_alarm"], outcome["status"]


# Shop demand in a huge loss (4e12, last place 2**-10 ~ 1e-3) beside a price term c / (x0 - x)
# with its pole DISTANCE below the point: the term is 1e-4 there (a tenth of the last place).
BASE = np.array([4.0e12, 1.5e12])
DISTANCE, HEIGHT = 5e-9, 1e-4
C = HEIGHT * DISTANCE
SLOPE = C / DISTANCE ** 2  # d/dx c / (x0 - x) = c / (x0 - x)^2 (a table's entry), 2e4


def _case(idle_slope: float):
    """The pole term on ``price[0]``, and a param ``idle`` forward ignores, given
    ``idle_slope`` by backward."""
    x = np.array([0.3, -0.4])
    pole = float(x[0]) - DISTANCE

    def forward(p, i):
        return float(np.sum(BASE * np.exp(i["rate"] * p["level"])) + C / (float(p["price"][0]) - pole)
                     + 1e-3 * float(p["price"][1]))

    def backward(p, i):
        return {"level": BASE * i["rate"] * np.exp(i["rate"] * p["level"]),
                "price": np.array([-C / (float(p["price"][0]) - pole) ** 2, 1e-3]),
                "idle": np.full(2, idle_slope)}

    params = {"level": np.array([0.0, 0.0]), "price": x, "idle": np.array([0.7, -1.2])}
    return probe(forward, backward, params, {"rate": np.array([1e-3, 2e-3])})


def test_a_pole_term_below_the_loss_rounding_is_not_failed_nor_an_ignored_param_given_its_slope():
    """The ignored param given the pole's slope (2e4) moves the loss no more than the pole's
    term does at any step taken: the slope would first show at steps of 2.4e-7, where a term
    like the pole's can bend back, and nothing tells the two apart (steep-270370: a correct
    slope of 6.8e8 whose whole term moves a loss of 1.3e18 by 8, under its last place of 256).
    Undecided, with the reason, not failed; a slope that would show within 2**-30 of the
    param's scale still fails (below)."""
    from gradprobe.engine.verdict import NEVER_MOVED

    report = _case(-SLOPE)
    text = render_text(report)
    assert report.tensor("price").status.value != "fail", text
    idle = report.tensor("idle")
    assert idle.status.value == "inconclusive", text
    assert idle.inconclusive_reason == NEVER_MOVED, text


def test_an_ignored_param_whose_slope_would_show_at_the_first_spacings_of_x_fails():
    """Given 1e8 (it would move the loss beyond its rounding at steps of 5e-11, a few hundred
    thousand spacings of x), the ignored param fails: no term bends back that close."""
    report = _case(-1e8)
    text = render_text(report)
    assert report.tensor("idle").status.value == "fail", text
    assert report.tensor("idle").failed == 2, text


def test_an_ignored_param_given_no_slope_passes_beside_the_pole():
    report = _case(0.0)
    assert report.tensor("idle").status.value == "pass", render_text(report)
