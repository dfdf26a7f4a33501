"""A check from the shell loads only what it uses.

At a ~10 us forward, start-up dominates what ``gradprobe check TARGET --json -`` costs
(bench/cost.py). These tests run the command in a fresh process and look at ``sys.modules``
afterwards: the terminal renderer (rich), the baseline comparison, the second-order engine,
the process pool, numpy.ma, the stack and autograd code and the TOML parser are loaded only
where a check asks for them. Not timed.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

# Sensor gains: loss = sum(sin(w * x)); d/dw sin(w x) = x cos(w x) (standard derivative
# table, d/du sin u = cos u, with the chain rule).
TARGET = """
import numpy as np
params = {"gain": np.array([0.3, -1.2, 0.8, 2.0])}
inputs = {"reading": np.array([1.5, 0.4, -2.0, 0.7])}
def forward(p, i):
    return float(np.sum(np.sin(p["gain"] * i["reading"])))
def backward(p, i):
    return {"gain": i["reading"] * np.cos(p["gain"] * i["reading"])}
"""

RUN = """
import json, runpy, sys
sys.argv = ["gradprobe", *sys.argv[1:]]
try:
    runpy.run_module("gradprobe", run_name="__main__")
except SystemExit as exc:
    code = exc.code
with open({modules!r}, "w") as f:
    json.dump({{"exit": code, "modules": sorted(sys.modules)}}, f)
"""

NOT_ON_THE_PLAIN_PATH = (
    "rich",  # the terminal table: --json - asks for none
    "gradprobe.render.terminal",
    "gradprobe.report.comparison",  # --baseline only
    "gradprobe.engine.second_order",  # targets with hvp/hessian only
    "gradprobe.engine.second_source",
    "gradprobe.engine.parallel",  # --jobs only
    "concurrent.futures",
    "numpy.ma",
    "traceback",  # --traceback on an error only
    "gradprobe.hints",  # hints explain failures: none fails here
    "gradprobe.engine.offpoint",  # the second look: coordinates at a kink only
    "gradprobe.engine.directional",  # random directions: sampled tensors only
    "gradprobe.report.baseline_file",  # --baseline only
    "gradprobe.report.baseline_model",
    "gradprobe.render.second_json",  # second derivatives checked only
    "gradprobe.targets.autograd_hvp",
    "gradprobe.targets.autograd",  # torch/jax targets with no backward only
    "gradprobe.targets.stack_split",  # stacks (and --jobs workers) only
    "gradprobe.report.blame",
    "tomllib",  # read only where a pyproject.toml is found (none above tmp_path)
)


def _run(tmp_path: Path, *args: str) -> tuple[int, set[str], str]:
    modules = tmp_path / "modules.json"
    script = tmp_path / "run.py"
    script.write_text(RUN.format(modules=str(modules)))
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run([sys.executable, str(script), *args], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=120)
    found = json.loads(modules.read_text())
    return found["exit"], set(found["modules"]), out.stdout


def _loaded(modules: set[str], name: str) -> bool:
    return name in modules or any(m.startswith(name + ".") for m in modules)


def test_a_json_check_loads_no_renderer_baseline_or_second_order_code(tmp_path):
    (tmp_path / "gains.py").write_text(textwrap.dedent(TARGET))
    code, modules, stdout = _run(tmp_path, "check", "gains.py", "--json", "-")
    report = json.loads(stdout)
    assert code == 0 and report["ok"] is True  # a correct target passes: the check ran
    assert "gradprobe.engine.runner" in modules and "numpy" in modules
    assert [name for name in NOT_ON_THE_PLAIN_PATH if _loaded(modules, name)] == []


def test_a_network_whose_coordinates_climb_the_step_levels_stays_lean(tmp_path):
    # bench/cost.py's small case (1,312 coordinates of a tanh regression): its coordinates
    # take the climbed pass, which once sorted with np.unique and so loaded numpy.ma.
    code, modules, stdout = _run(tmp_path, "check", f"{ROOT / 'bench' / 'cost_cases.py'}:small",
                                 "--json", "-")
    assert code == 0 and json.loads(stdout)["summary"]["checked"] == 1312
    assert "gradprobe.engine.climbed" in modules
    assert [name for name in NOT_ON_THE_PLAIN_PATH if _loaded(modules, name)] == []


def test_the_terminal_report_still_loads_rich(tmp_path):
    # The counterpart: the same look at sys.modules sees rich where the table is printed.
    (tmp_path / "gains.py").write_text(textwrap.dedent(TARGET))
    code, modules, _ = _run(tmp_path, "check", "gains.py")
    assert code == 0
    assert _loaded(modules, "rich") and "gradprobe.render.terminal" in modules


# The same gains with backward's cosine doubled: every coordinate fails by a factor of 2.
DOUBLED = TARGET.replace("i[\"reading\"] * np.cos", "2.0 * i[\"reading\"] * np.cos")

# Sensor deadbands: loss = sum(|w|), d/dw |w| = sign(w) away from 0 (standard derivative
# table); at w = 0 the loss has a kink, and backward returns 0 there (a value between the sides).
KINKED = """
import numpy as np
params = {"deadband": np.array([0.0, -1.2, 0.8, 0.0])}
inputs = {}
def forward(p, i):
    return float(np.sum(np.abs(p["deadband"])))
def backward(p, i):
    return {"deadband": np.sign(p["deadband"])}
"""


def test_a_failure_loads_the_hints_and_a_kink_the_second_look(tmp_path):
    # The counterparts of what a passing check leaves out: each loads where it is needed.
    assert DOUBLED != TARGET
    (tmp_path / "gains.py").write_text(textwrap.dedent(DOUBLED))
    code, modules, stdout = _run(tmp_path, "check", "gains.py", "--json", "-")
    tensor = json.loads(stdout)["layers"][0]["tensors"][0]
    assert code == 1 and tensor["status"] == "fail" and "gradprobe.hints" in modules
    assert "factor" in (tensor["hint"] or "")  # analytic = 2 x numeric everywhere
    (tmp_path / "deadbands.py").write_text(textwrap.dedent(KINKED))
    code, modules, stdout = _run(tmp_path, "check", "deadbands.py", "--json", "-")
    assert code == 0 and json.loads(stdout)["summary"]["kinks"] >= 1
    assert "gradprobe.engine.offpoint" in modules and not _loaded(modules, "gradprobe.hints")


def test_version_loads_neither_numpy_nor_rich(tmp_path):
    code, modules, stdout = _run(tmp_path, "--version")
    assert code in (0, None) and stdout.startswith("gradprobe ")
    assert not _loaded(modules, "numpy") and not _loaded(modules, "rich")


def test_a_pyproject_without_a_gradprobe_table_is_not_parsed(tmp_path):
    # A project's pyproject.toml with other tools' tables: nothing for gradprobe, no parser.
    (tmp_path / "gains.py").write_text(textwrap.dedent(TARGET))
    (tmp_path / "pyproject.toml").write_text('[project]\nname = "gains"\n[tool.mypy]\nstrict = true\n')
    code, modules, stdout = _run(tmp_path, "check", "gains.py", "--json", "-")
    assert code == 0 and json.loads(stdout)["ok"] is True
    assert "tomllib" not in modules and "gradprobe.settings.config" in modules
    # The counterpart: with a [tool.gradprobe] table the parser is loaded and the table read.
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\nseed = 4\n')
    code, modules, stdout = _run(tmp_path, "check", "gains.py", "--json", "-")
    assert code == 0 and "tomllib" in modules and json.loads(stdout)["seed"] == 4
