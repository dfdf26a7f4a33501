"""The status vocabulary."""

from __future__ import annotations

import json

from gradprobe import Status
from gradprobe.common.status import worst


def test_status_compares_equal_to_the_protocol_strings():
    assert Status.FAIL == "fail" and Status("kink") is Status.KINK


def test_status_serialises_as_its_string():
    assert json.dumps([Status.KINK]) == '["kink"]' and str(Status.INCONCLUSIVE) == "inconclusive"


def test_worst_orders_pass_kink_inconclusive_fail():
    assert worst([Status.PASS, Status.INCONCLUSIVE, Status.KINK]) is Status.INCONCLUSIVE


def test_worst_of_nothing_is_pass():
    assert worst([]) is Status.PASS


def test_statuses_order_by_severity_and_codes_follow_it():
    from gradprobe.common.status import FAIL, INCONCLUSIVE, KINK, PASS

    assert Status.PASS < Status.KINK < Status.INCONCLUSIVE < Status.FAIL
    assert sorted([Status.FAIL, Status.PASS, Status.INCONCLUSIVE, Status.KINK]) == list(Status)
    assert [Status.of_code(c) for c in (PASS, KINK, INCONCLUSIVE, FAIL)] == list(Status)
