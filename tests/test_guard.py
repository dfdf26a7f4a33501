"""The guard against user code ending the process."""

from __future__ import annotations

import os
import sys

import pytest

from gradprobe import ProcessExitError
from gradprobe.common.guard import guarded


def test_os_exit_is_restored_after_the_guard():
    real = os._exit
    with pytest.raises(ProcessExitError), guarded("forward"):
        os._exit(4)
    assert os._exit is real


def test_nested_guards_restore_only_at_the_outermost():
    real = os._exit
    with guarded():
        with guarded():
            pass
        assert os._exit is not real
    assert os._exit is real


def test_sys_exit_without_a_code():
    with pytest.raises(ProcessExitError) as info, guarded("backward"):
        sys.exit()
    assert str(info.value) == (
        "backward called sys.exit(), so the check did not finish (a target must return, "
        "not end the process).")
