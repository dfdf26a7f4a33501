"""From the engine's per-coordinate codes to a tensor's result."""

from __future__ import annotations

import numpy as np

from gradprobe import Status
from gradprobe.engine.status import FAIL, INCONCLUSIVE, KINK, PASS
from gradprobe.engine.summary import STATUS_OF_CODE, problem_result, status_of


def test_every_engine_code_has_a_status():
    assert STATUS_OF_CODE == {PASS: Status.PASS, KINK: Status.KINK,
                              INCONCLUSIVE: Status.INCONCLUSIVE, FAIL: Status.FAIL}


def test_a_failure_outranks_inconclusive_and_kinks():
    assert status_of(failed=1, inconclusive=2, kinks=3) is Status.FAIL


def test_inconclusive_outranks_kinks():
    assert status_of(failed=0, inconclusive=1, kinks=3) is Status.INCONCLUSIVE


def test_kinks_alone_are_kink():
    assert status_of(0, 0, 2) is Status.KINK and status_of(0, 0, 0) is Status.PASS


def test_a_gradient_that_could_not_be_compared_fails_with_its_sentence():
    result = problem_result("w", "w", "param", np.zeros((2, 3)), "backward returned no gradient for w")
    assert (result.status, result.checked, result.hint, result.shape) == (
        Status.FAIL, 0, "backward returned no gradient for w", (2, 3))
