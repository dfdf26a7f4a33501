"""The gap between the one-sided quotients tells a loss smooth within the steps from one whose
steps cross kinks or corners: along a smooth loss it is f'' h + f'''' h**3 / 12 + ..., one sign
and halving with the step, and the sides' first-order extrapolations agree; kinks and corners
within the steps turn it or part them. A central estimate is trusted no further than that.
"""

from __future__ import annotations

import importlib.util
import math

import numpy as np

from gradprobe.engine.sides_gap import extrapolations_apart, gap_turns

STEPS = 1e-3 / 2.0 ** np.arange(5)


def _sides(f, x: float) -> tuple[np.ndarray, np.ndarray]:
    """One-sided quotients of ``f`` at ``x`` over STEPS, as a (rows, 1) column each."""
    right = np.array([(f(x + h) - f(x)) / h for h in STEPS])[:, None]
    left = np.array([(f(x) - f(x - h)) / h for h in STEPS])[:, None]
    return right, left


def test_a_smooth_loss_shows_no_turn_and_extrapolations_that_agree():
    """exp at 0.3 (d/dx e^x = e^x, a standard table entry): the gap is e^0.3 h + ..., one sign
    and halving; the sides' first-order extrapolations both carry -f''' h**2 / 12 and meet to
    the rounding (1e-13 here, far below any room the check allows)."""
    right, left = _sides(math.exp, 0.3)
    noise = np.full_like(right, 4e-16 / STEPS[-1])
    assert not gap_turns(right, left, noise)[0]
    assert extrapolations_apart(right, left, noise)[0] == 0.0


def test_a_corner_at_the_point_parts_nothing():
    """f = x**2 for x > 0 and 3 x**2 below (f' = 0 at 0, f'' jumping from 6 to 2): the sides are
    exactly h and -3 h, their extrapolations both 0, the gap 4 h halving with the step."""
    right, left = _sides(lambda x: x * x if x > 0 else 3 * x * x, 0.0)
    noise = np.full_like(right, 1e-20)
    assert not gap_turns(right, left, noise)[0]
    assert extrapolations_apart(right, left, noise)[0] == 0.0


def test_a_kink_within_the_steps_turns_the_gap_and_parts_the_extrapolations():
    """5 x**2 - |x - d| at 0 with d = 1.5e-4, between the steps (1e-3 ... 6.25e-5): wider steps
    reach past the kink on the right (the right quotient falls by 2 (h - d) / h), the smaller
    ones do not; the gap is 10 h - 2 + 2 d / h < 0 beyond the kink and 10 h > 0 within it."""
    d = 1.5e-4
    right, left = _sides(lambda x: 5 * x * x - abs(x - d), 0.0)
    noise = np.full_like(right, 1e-12)
    assert gap_turns(right, left, noise)[0]
    # Last two rows: g(1.25e-4) = 1.25e-3 and g(6.25e-5) = 6.25e-4 (both within the kink), so
    # the extrapolations meet; the two rows before them part them by |2 g(2.5e-4) - g(5e-4)|.
    assert extrapolations_apart(right[-3:-1], left[-3:-1], noise[-3:-1])[0] > 0.5


def test_rounding_alone_neither_turns_the_gap_nor_parts_the_sides():
    """A gap of a few units of its rounding, of either sign, is no evidence: within 2 NOISE_UNITS
    (4) times the rounding it is taken as noise."""
    right = np.array([[1.0 + 3e-9], [1.0 - 3e-9], [1.0 + 2e-9]])
    left = np.ones_like(right)
    noise = np.full_like(right, 1e-9)
    assert not gap_turns(right, left, noise)[0]
    assert extrapolations_apart(right, left, noise)[0] == 0.0


def test_relu_rows_tied_at_zero_and_a_hair_from_it_are_no_failure():
    """kinks-72055: ReLU residuals at 0 exactly (dyadic params, integer inputs) and 3e-14,
    2e-12, 2e-10, 6e-10 ... away along p3[1, 1]. The analytic value is the left derivative at
    the point, which no step above 3e-14 reaches; the sides at 1e-10 stay 200 apart (2
    units of their rounding) after their gap turned from +697 to -650 beyond it. The central
    quotients, the sides' mean, were trusted at +-93 and failed a correct value. Reference:
    mpmath, through the adversarial generator's judge."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 72055)
    assert not o["false_alarm"], (o["status"], o["expect"])


def test_huber_corners_at_every_distance_within_the_steps_are_no_failure():
    """kinks-71026: Huber residuals on their corners and 1.6e-11 ... 8e-5 away along p1[1, 1].
    The central quotients settled by coincidence (a last change of 5e-5 after 4.6e-3) at
    666.186 +- 0.003 against a true 666.197; the sides' first-order extrapolations from the
    last two rows lie 0.010 apart. Reference: mpmath, through the generator's judge."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 71026)
    assert not o["false_alarm"], (o["status"], o["expect"])


def _case(tmp_path, category: str, seed: int):
    from adversarial.bugs import make_case
    from adversarial.case import write

    write(make_case(category, seed), str(tmp_path))
    spec = importlib.util.spec_from_file_location("gap_case", tmp_path / f"{category}-{seed}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_a_one_percent_error_on_the_same_cases_still_fails(tmp_path):
    """The two cases above with the tensor in question 1% too large everywhere: away from the
    kinks' crowd the quotients settle on the true value and the error shows."""
    from gradprobe import probe

    for seed, name in ((72055, "p3"), (71026, "p1")):
        module = _case(tmp_path, "kinks", seed)
        params, inputs = module.setup()

        def scaled(p, i, module=module, name=name):
            g = module.backward(p, i)
            return {**g, name: 1.01 * np.asarray(g[name])}

        report = probe(module.forward, scaled, params, inputs)
        assert report.tensor(name).status.value == "fail", seed


def test_a_smooth_loss_s_third_order_disagreement_is_not_taken_for_kinks():
    """exp(3 x) at 0.1 over steps 0.05 ... 3.1e-3 (d/dx e^(3x) = 3 e^(3x), a table's entry): the
    sides' extrapolations part by f'''' h**3 / 16, 1.7e-6 at the last rows, far beyond rounding,
    but shrinking eightfold per halving as the smooth model says; a central tableau converged
    beyond that term is not held to it. The same rows with a kink crossed between them are."""
    steps = 0.05 / 2.0 ** np.arange(5)

    def sides(f, x):
        right = np.array([(f(x + h) - f(x)) / h for h in steps])[:, None]
        left = np.array([(f(x) - f(x - h)) / h for h in steps])[:, None]
        return right, left

    right, left = sides(lambda x: math.exp(3 * x), 0.1)
    noise = np.full_like(right, 1e-14)
    assert abs(2 * (right - left)[-1, 0] - (right - left)[-2, 0]) > 1e-6  # far beyond rounding
    assert extrapolations_apart(right, left, noise)[0] == 0.0
    right, left = sides(lambda x: math.exp(3 * x) - abs(x - 0.1 - 5e-3), 0.1)  # a kink 5e-3 away
    assert extrapolations_apart(right, left, noise)[0] > 0.1


def test_a_kink_closer_than_every_step_beside_curvature_keeps_the_sides_apart():
    """The chain of steps ascending from 4e-3 to 0.5 (as the chain on measured rounding takes
    them). cosh(x) + 1e-5 |x - 1e-9| at 0.0: the gap is the jump 2e-5 (|u|' = sign(u), a table
    entry) less a hair, plus cosh's f'' h = h: curvature halves, the jump stays, and
    does_not_halve sees only the halving. The sides' extrapolations 2 g(h) - g(2 h) keep the
    jump at every step; cosh alone (f'''' = 1, Taylor) parts them by h**3 / 2, eightfold less
    per halving."""
    from gradprobe.engine.sides_gap import does_not_halve, extrapolations_stay_apart

    steps = 4e-3 * 2.0 ** np.arange(8)

    def rows(f):
        right = np.array([(f(h) - f(0.0)) / h for h in steps])[:, None]
        left = np.array([(f(0.0) - f(-h)) / h for h in steps])[:, None]
        return right - left

    noise = (4.0 * np.finfo(np.float64).eps / steps)[:, None]
    kinked = rows(lambda x: math.cosh(x) + 1e-5 * abs(x - 1e-9))
    smooth = rows(math.cosh)
    assert not does_not_halve(np.abs(kinked), 2.0 * noise)[0]
    assert extrapolations_stay_apart(kinked, noise)[0]
    assert not extrapolations_stay_apart(smooth, noise)[0]
