"""User code that tries to end the process: exit 2 with one sentence, never a pass.

``sys.exit`` cases run in-process (the guard turns them into errors); ``os._exit`` cases run
in a subprocess, so a broken guard would fail the test rather than end the test session.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from gradprobe import ProcessExitError, probe

ROOT = Path(__file__).resolve().parent.parent
TAIL = ", so the check did not finish (a target must return, not end the process)."

TARGET = """
import os, sys
import numpy as np
params = {{"w": np.array([0.5, -1.0, 2.0])}}
def forward(p, i):
    if {forward_ends}:
        {ending}
    return float(np.sum(np.sin(p["w"])))
def backward(p, i):
    if {backward_ends}:
        {ending}
    return {{"w": np.cos(p["w"])}}
"""


def _target(path: Path, ending: str, forward_ends: str = "False", backward_ends: str = "False") -> str:
    path.write_text(textwrap.dedent(TARGET.format(
        ending=ending, forward_ends=forward_ends, backward_ends=backward_ends)))
    return path.name


def _said(result) -> tuple[int, str]:
    return result.exit_code, result.stderr.strip().splitlines()[-1]


PERTURBED = 'p["w"][0] != 0.5'  # only once gradprobe perturbs w[0]


def test_sys_exit_0_in_forward_is_not_a_pass(run_cli, tmp_path):
    """The silent-pass case: sys.exit(0) from the very first forward call."""
    name = _target(tmp_path / "case.py", "sys.exit(0)", forward_ends="True")
    assert _said(run_cli("check", name)) == (
        2, f"gradprobe: error: case.py: forward or backward called sys.exit(0){TAIL}")


def test_sys_exit_in_a_perturbed_forward_names_the_coordinate(run_cli, tmp_path):
    name = _target(tmp_path / "case.py", "sys.exit(0)", forward_ends=PERTURBED)
    assert _said(run_cli("check", name)) == (
        2, f"gradprobe: error: case.py: forward called sys.exit(0) when w[0] was perturbed{TAIL}")


def test_sys_exit_with_a_message_in_backward(run_cli, tmp_path):
    """sys.exit('message') used to look like a failing tensor (exit 1)."""
    name = _target(tmp_path / "case.py", 'sys.exit("done")', backward_ends="True")
    assert _said(run_cli("check", name)) == (
        2, f"gradprobe: error: case.py: forward or backward called sys.exit('done'){TAIL}")


def test_sys_exit_in_setup(run_cli, tmp_path):
    (tmp_path / "case.py").write_text(textwrap.dedent("""
        import sys
        def setup():
            sys.exit(3)
        def forward(p, i):
            return 0.0
        backward = forward
    """))
    assert _said(run_cli("check", "case.py")) == (
        2, f"gradprobe: error: case.py: setup() called sys.exit(3){TAIL}")


def test_sys_exit_while_importing(run_cli, tmp_path):
    (tmp_path / "case.py").write_text("import sys\nsys.exit()\n")
    assert _said(run_cli("check", "case.py")) == (
        2, f"gradprobe: error: case.py: the module called sys.exit(){TAIL}")


def test_sys_exit_in_a_worker_process(run_cli, tmp_path):
    name = _target(tmp_path / "case.py", "sys.exit(0)", forward_ends=PERTURBED)
    code, line = _said(run_cli("check", name, "--jobs", "2"))
    assert (code, line) == (
        2, f"gradprobe: error: case.py: forward called sys.exit(0) when w[0] was perturbed{TAIL}")


def test_the_api_raises_and_leaves_the_arrays_alone():
    """probe() raises ProcessExitError; the caller's arrays are bitwise unchanged."""
    w = np.array([0.5, -1.0, 2.0])
    before = w.tobytes()

    def forward(p, i):
        if p["w"][1] != -1.0:
            sys.exit(0)
        return float(np.sum(p["w"] ** 2))

    with pytest.raises(ProcessExitError) as info:
        probe(forward, lambda p, i: {"w": 2 * p["w"]}, {"w": w}, label="<python>")
    assert str(info.value) == f"<python>: forward called sys.exit(0) when w[1] was perturbed{TAIL}"
    assert w.tobytes() == before


def _cli(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "gradprobe", "check", *args], cwd=tmp_path,
                          capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})


@pytest.mark.parametrize(("where", "jobs"), [("forward", "1"), ("backward", "1"), ("forward", "2")])
def test_os_exit_is_caught(tmp_path, where, jobs):
    """os._exit(0) would end the process at once; during a check it is an error instead."""
    ends = {"forward_ends": PERTURBED} if where == "forward" else {"backward_ends": "True"}
    name = _target(tmp_path / "case.py", "os._exit(0)", **ends)
    done = _cli(tmp_path, name, "--jobs", jobs)
    who = "forward called os._exit(0) when w[0] was perturbed" if where == "forward" else (
        "forward or backward called os._exit(0)")
    assert (done.returncode, done.stderr.strip().splitlines()[-1]) == (
        2, f"gradprobe: error: case.py: {who}{TAIL}")


def test_os_exit_while_importing(tmp_path):
    (tmp_path / "case.py").write_text("import os\nos._exit(0)\n")
    done = _cli(tmp_path, "case.py")
    assert (done.returncode, done.stderr.strip().splitlines()[-1]) == (
        2, f"gradprobe: error: case.py: the module called os._exit(0){TAIL}")
