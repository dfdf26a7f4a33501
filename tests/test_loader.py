"""Every target form of the protocol, and every way loading can fail (exit 2, one sentence)."""

from __future__ import annotations

import subprocess
import sys

import pytest

GOOD = """
import numpy as np

def setup():
    return {"w": np.array([0.5, -1.0, 2.0])}, {"c": np.array([1.0, 2.0, 3.0])}

def forward(params, inputs):
    return float(np.sum(inputs["c"] * params["w"] ** 2))

def backward(params, inputs):
    return {"w": 2 * inputs["c"] * params["w"]}
"""


def _error_line(result) -> str:
    lines = [l for l in result.output.splitlines() if l.startswith("gradprobe: error:")]
    assert len(lines) == 1, result.output
    return lines[0]


def test_file_path_target(write_target, run_cli):
    write_target(GOOD, "good.py")
    result = run_cli("check", "good.py")
    assert result.exit_code == 0, result.output
    assert "w" in result.output


def test_dotted_module_target(write_target, run_cli):
    write_target(GOOD, "goodmod.py")
    assert run_cli("check", "goodmod").exit_code == 0


def test_attribute_that_is_a_class_is_instantiated(write_target, run_cli):
    write_target(
        """
        import numpy as np

        class Case:
            def __init__(self):
                self.params = {"w": np.array([1.0, 2.0])}
            def forward(self, params, inputs):
                return float(np.sum(params["w"] ** 3))
            def backward(self, params, inputs):
                return {"w": 3 * params["w"] ** 2}
        """,
        "cls.py",
    )
    assert run_cli("check", "cls.py:Case").exit_code == 0
    assert run_cli("check", "cls:Case").exit_code == 0


def test_attribute_that_is_a_function_is_called(write_target, run_cli):
    write_target(
        """
        import numpy as np
        from types import SimpleNamespace

        def make():
            return SimpleNamespace(
                params={"w": np.array([1.0, 2.0])},
                forward=lambda p, i: float(np.sum(np.exp(p["w"]))),
                backward=lambda p, i: {"w": np.exp(p["w"])},
            )
        """,
        "fn.py",
    )
    assert run_cli("check", "fn.py:make").exit_code == 0


def test_attribute_used_as_is(write_target, run_cli):
    write_target(
        """
        import numpy as np
        case = {
            "params": {"w": np.array([1.0, 2.0])},
            "forward": lambda p, i: float(np.sum(p["w"] ** 2)),
            "backward": lambda p, i: {"w": 2 * p["w"]},
        }
        """,
        "obj.py",
    )
    assert run_cli("check", "obj.py:case").exit_code == 0


def test_file_sibling_imports_work(write_target, run_cli):
    write_target("SCALE = 3.0\n", "helper_consts.py")
    write_target(GOOD.replace("import numpy as np", "import numpy as np\nfrom helper_consts import SCALE"), "uses.py")
    assert run_cli("check", "uses.py").exit_code == 0


@pytest.mark.parametrize(
    "files, spec, expected",
    [
        ({}, "missing.py", "missing.py: no such file missing.py; name a Python file (a path from the current folder) or a module."),
        ({}, "no_such_module_here", ("no_such_module_here: no module named no_such_module_here on sys.path or in the "
          "current folder (name a file as path/to/file.py).")),
        ({"boom.py": "raise RuntimeError('sensor table not found')\n"}, "boom.py",
         "boom.py: importing it raised RuntimeError: sensor table not found; fix it there (--traceback shows where)."),
        ({"deps.py": "import package_that_is_not_installed\n"}, "deps",
         "deps: importing it raised ModuleNotFoundError: No module named "
         "'package_that_is_not_installed'; install the missing module or fix the import."),
        ({"g.py": GOOD}, "g.py:dense_case",
         "g.py:dense_case: g.py has no attribute 'dense_case'; name a function, class or object it defines."),
        ({"g.py": GOOD + "\ndense_cases = None\n"}, "g.py:dense_case",
         "g.py:dense_case: g.py has no attribute 'dense_case'; did you mean 'dense_cases'?"),
        ({"nofwd.py": "params = {'w': [1.0]}\ndef backward(p, i): return {}\n"}, "nofwd.py",
         "nofwd.py: the target has no forward function; define forward(params, inputs) returning the loss (or an output array)."),
        ({"nobwd.py": "params = {'w': [1.0]}\ndef forward(p, i): return 0.0\n"}, "nobwd.py",
         "nobwd.py: the target has no backward function; define backward(params, inputs) returning the loss's gradient as a mapping shaped like params."),
        ({"noarr.py": "def forward(p, i): return 0.0\ndef backward(p, i): return {}\n"}, "noarr.py",
         "noarr.py: the target has neither setup() nor params; define setup() returning (params, inputs), or a params mapping."),
        ({"bad_setup.py": GOOD.replace("def setup():", "def setup():\n    return [1, 2]\n\ndef _old():")},
         "bad_setup.py",
         "bad_setup.py: setup() must return (params, inputs) but returned list; return a pair of mappings, e.g. return {'w': w}, {'x': x}."),
        ({"three.py": GOOD.replace("return {\"w\": np.array([0.5, -1.0, 2.0])},", "return {}, {},")},
         "three.py",
         "three.py: setup() must return (params, inputs) but returned a tuple of 3; return a pair of mappings, e.g. return {'w': w}, {'x': x}."),
        ({"raises.py": GOOD.replace("def setup():", "def setup():\n    raise KeyError('plot_id')")},
         "raises.py", "raises.py: setup() raised KeyError: 'plot_id'; fix it there (--traceback shows where)."),
        ({"strs.py": GOOD.replace("np.array([0.5, -1.0, 2.0])", "'abc'")}, "strs.py",
         "strs.py: param w is not a numeric array (it is str of dtype <U3)."),
        ({"ints.py": GOOD.replace("np.array([0.5, -1.0, 2.0])", "np.array([1, 2, 3])")}, "ints.py",
         "ints.py: the target has no floating-point params to check."),
        ({"notmap.py": "params = [1.0]\ndef forward(p, i): return 0.0\ndef backward(p, i): return {}\n"},
         "notmap.py", "notmap.py: params must be a mapping of name -> array, not list; give a dict such as {'w': np.zeros(3)}."),
        ({"ctor.py": "class Case:\n    def __init__(self):\n        raise ValueError('no config')\n"},
         "ctor.py:Case", "ctor.py:Case: calling Case() raised ValueError: no config; fix it there (--traceback shows where)."),
        ({"lazy.py": "def __getattr__(name):\n    raise ValueError('no plot named ' + name)\n"},
         "lazy.py:plot_7", "lazy.py:plot_7: looking up plot_7 raised ValueError: no plot named plot_7; fix it there (--traceback shows where)."),
    ],
)
def test_load_errors_are_one_sentence_and_exit_2(write_target, run_cli, files, spec, expected):
    for name, source in files.items():
        write_target(source, name)
    result = run_cli("check", spec)
    assert result.exit_code == 2
    assert _error_line(result) == f"gradprobe: error: {expected}"  # names the target first
    assert "Traceback" not in result.output


def test_traceback_flag_shows_the_trace(write_target, run_cli):
    write_target("raise RuntimeError('sensor table not found')\n", "boom.py")
    result = run_cli("check", "boom.py", "--traceback")
    assert result.exit_code == 2
    assert "Traceback" in result.output and "sensor table not found" in result.output


def test_load_error_as_a_real_subprocess(tmp_path):
    """The installed console entry gives one sentence and exit 2, no traceback."""
    (tmp_path / "boom.py").write_text("raise RuntimeError('sensor table not found')\n")
    proc = subprocess.run(
        [sys.executable, "-m", "gradprobe", "check", "boom.py"],
        cwd=tmp_path, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [
        "gradprobe: error: boom.py: importing it raised RuntimeError: sensor table not found; "
        "fix it there (--traceback shows where)."
    ]
    assert proc.stdout == ""
