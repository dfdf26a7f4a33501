"""From the engine's per-coordinate codes to a tensor's result."""

from __future__ import annotations

import numpy as np

from gradprobe import Status
from gradprobe.status import FAIL, INCONCLUSIVE, KINK, PASS
from gradprobe.engine.coordinates import CoordinateOutcome
from gradprobe.engine.summary import problem_result, tensor_result


def _outcome(codes: list[int]) -> CoordinateOutcome:
    n = len(codes)
    rel = np.linspace(0.1, 0.2, n)
    return CoordinateOutcome(
        flat=np.arange(n), analytic=np.ones(n), numeric=np.ones(n) + rel, error_estimate=np.full(n, 1e-9),
        rel=rel, abs=rel, scale=np.ones(n), status=np.array(codes, dtype=np.int8),
        reasons=tuple("noise" if c == INCONCLUSIVE else None for c in codes), evaluations=2 * n)


def _summarised(codes: list[int]) -> Status:
    return tensor_result("w", "w", "param", (len(codes),), np.dtype(np.float64), _outcome(codes)).status


def test_a_tensor_takes_its_worst_coordinate_s_status():
    assert _summarised([PASS, KINK, INCONCLUSIVE, FAIL]) is Status.FAIL
    assert _summarised([KINK, INCONCLUSIVE, PASS]) is Status.INCONCLUSIVE
    assert _summarised([PASS, KINK]) is Status.KINK
    assert _summarised([PASS, PASS]) is Status.PASS


def test_listed_coordinates_carry_their_engine_code_s_status():
    result = tensor_result("w", "w", "param", (3,), np.dtype(np.float64), _outcome([FAIL, PASS, INCONCLUSIVE]))
    assert [(d.index, d.status) for d in result.details] == [((0,), Status.FAIL), ((2,), Status.INCONCLUSIVE)]
    assert (result.failed, result.inconclusive, result.inconclusive_reason) == (1, 1, None)


def test_a_gradient_that_could_not_be_compared_fails_with_its_sentence():
    result = problem_result("w", "w", "param", np.zeros((2, 3)), "backward returned no gradient for w")
    assert (result.status, result.checked, result.hint, result.shape) == (
        Status.FAIL, 0, "backward returned no gradient for w", (2, 3))
