"""Ctrl-C during a check with worker processes: quick return, exit 130, no worker left."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

SLOW_TARGET = """
import os, time
from pathlib import Path
import numpy as np

params = {"w": np.linspace(-1.0, 1.0, 4000)}  # minutes of work: the check is still running when Ctrl-C comes

def forward(p, i):
    Path(os.environ["PIDS"], str(os.getpid())).touch()  # who is evaluating
    time.sleep(0.02)
    return float(np.sum(np.sin(p["w"])))

def backward(p, i):
    return {"w": np.cos(p["w"])}
"""


def _gone(group: int) -> bool:
    try:
        os.killpg(group, 0)
    except ProcessLookupError:
        return True
    return False


@pytest.mark.skipif(not hasattr(os, "killpg"), reason="process groups are POSIX")
def test_ctrl_c_with_two_jobs_returns_at_once_and_leaves_no_worker(tmp_path):
    (tmp_path / "slow.py").write_text(textwrap.dedent(SLOW_TARGET))
    pids = tmp_path / "pids"
    pids.mkdir()
    env = {**os.environ, "PYTHONPATH": str(ROOT), "PIDS": str(pids)}
    child = subprocess.Popen(
        [sys.executable, "-m", "gradprobe", "check", str(tmp_path / "slow.py"), "--jobs", "2"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, start_new_session=True)
    deadline = time.monotonic() + 60
    while len(list(pids.iterdir())) < 3 and time.monotonic() < deadline:  # main + 2 workers
        time.sleep(0.05)
    assert len(list(pids.iterdir())) >= 3, "the workers never evaluated"
    sent = time.monotonic()
    os.killpg(child.pid, signal.SIGINT)  # as a terminal's Ctrl-C does: the whole group
    _, err = child.communicate(timeout=30)
    latency = time.monotonic() - sent
    assert child.returncode == 130
    assert err.strip().splitlines()[-1] == "gradprobe: interrupted; your arrays are unchanged"
    assert latency < 3.0, f"took {latency:.1f} s to return"
    for _ in range(20):
        if _gone(child.pid):
            break
        time.sleep(0.05)
    assert _gone(child.pid), "a worker process outlived the interrupted check"
