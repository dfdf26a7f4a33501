"""From the engine's per-coordinate codes to a tensor's result."""

from __future__ import annotations

import numpy as np

from gradprobe import Status
from gradprobe.common.status import FAIL, INCONCLUSIVE, KINK, PASS
from gradprobe.engine.coordinates import CoordinateOutcome
from gradprobe.engine.record import TensorRecord
from gradprobe.engine.summary import tensor_result


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
    record = TensorRecord("w", "w", "param", (2, 3), "float64", problem="backward returned no gradient for w")
    result = record.result()
    assert (result.status, result.checked, result.hint, result.shape) == (
        Status.FAIL, 0, "backward returned no gradient for w", (2, 3))


def test_the_second_look_s_failures_and_calls_reach_the_result():
    """A record whose kink coordinate failed at a moved point: the result is summarised from
    the moved outcome, and counts the first check's calls plus the second look's."""
    first = _outcome([PASS, KINK])
    moved = CoordinateOutcome(**{**first.__dict__, "status": np.array([PASS, FAIL], dtype=np.int8),
                                 "evaluations": first.evaluations + 6})
    record = TensorRecord("w", "w", "param", (2,), "float64", outcome=first, evaluations=10)
    assert (record.result().status, record.result().evaluations) == (Status.KINK, 10)
    record.moved = moved
    result = record.result()
    assert (result.status, result.bad_indices, result.evaluations) == (Status.FAIL, ((1,),), 16)


def test_an_unconfirmed_direction_makes_a_passing_tensor_inconclusive_but_not_a_failing_one():
    passing = TensorRecord("w", "w", "param", (2,), "float64", outcome=_outcome([PASS, KINK]), unconfirmed=True)
    assert passing.result().status is Status.INCONCLUSIVE and "random-direction" in passing.result().inconclusive_reason
    failing = TensorRecord("w", "w", "param", (2,), "float64", outcome=_outcome([PASS, FAIL]), unconfirmed=True)
    assert failing.result().status is Status.FAIL
