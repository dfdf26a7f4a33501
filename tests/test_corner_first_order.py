"""A Huber residual exactly on its corner at the point: f'' jumps there, so the central
quotients' error is first order in the step ((f''+ - f''-) h / 4), and their changes halve
as the step halves instead of quartering. A window of steps extrapolated as if the error were
h**2 then keeps a third of it and calls the result sharp; in float64 code's chain on its
measured rounding the windows must see the changes shrink fourfold (to FIRST_ORDER_LIMIT,
with room for rounding) before they are used.
"""

from __future__ import annotations

import numpy as np

from gradprobe.engine.wide_steps import FIRST_ORDER_LIMIT, shrinking


def test_changes_that_halve_are_no_second_order_error():
    # D(h) = f' + c h with c = 0.22 (kinks-120676's column, from memory of its quotients)
    h = 2.0 ** -np.arange(12, 5, -1)
    d = -0.180333 + 0.22 * h
    changes = list(np.diff(d))
    assert not shrinking(changes, [np.zeros(()) for _ in changes], FIRST_ORDER_LIMIT).item()


def test_changes_that_quarter_are_second_order():
    h = 2.0 ** -np.arange(12, 5, -1)
    d = -0.180333 + 3.0 * h**2  # a smooth loss: common practice, the central error is c h**2
    changes = list(np.diff(d))
    assert shrinking(changes, [np.zeros(()) for _ in changes], FIRST_ORDER_LIMIT).item()
    assert 0.25 < FIRST_ORDER_LIMIT < 0.5


def test_the_generator_s_huber_corner_at_the_point_is_no_failure():
    """kinks-120676: Huber residuals on their corner (|z| = 1 exactly) and others 3e-13 to 1e-10
    from it. Reference: mpmath, through the adversarial generator's judge; the backward is
    correct, so no tensor may fail."""
    from adversarial import judged_cleanly

    o = judged_cleanly("kinks", 120676)
    assert not o["false_alarm"], (o["status"], o["expect"])
