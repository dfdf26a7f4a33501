"""Shape fuzz: every shape and memory layout through every path of a check, correct and buggy.

Shapes: 0-d, (1,), (0,) and (2, 0) empty, size-1 in several axes, C, Fortran, strided,
reversed and broadcast-view (np.broadcast_to, read-only, stride 0) arrays, float32 beside
float64, and a million elements. Paths: the first check, re-estimates (richardson, no recheck),
the second look (a kinked target), the fuzz measure (a near-flat buggy target), directions,
localisation (sample 0, one wrong element), worker processes, stacks with a 0-d param, and the
terminal (with --map), JSON, JUnit and HTML renderers. Every case must finish without an exception, leave the
caller's arrays bitwise unchanged, keep a correct target from failing and fail the planted bug
(the targets' derivatives: tests/shape_targets.py, from A&S 4.5 and the chain rule).
"""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from shape_targets import BUGGY, VARIANTS, element_index, load, source

import gradprobe

SHAPES = [((), "c"), ((1,), "c"), ((0,), "c"), ((2, 0), "c"), ((1, 1), "c"), ((1, 3, 1), "c"),
          ((3, 4), "fortran"), ((3, 4), "strided"), ((3, 4), "reversed"), ((3, 4), "broadcast"),
          ((1, 4), "broadcast"), ((2, 3, 2), "fortran"), ((2, 3, 4, 2), "strided")]
PATHS = {"default": {}, "richardson": {"method": "richardson"}, "no-recheck": {"recheck": False},
         "directions": {"directions": 3}, "sample-0": {"sample": 0}}
FEW = [((), "c"), ((0,), "c"), ((1, 3, 1), "c"), ((3, 4), "broadcast"), ((3, 4), "fortran")]


def _ids(shape, layout):
    return f"{'x'.join(map(str, shape)) or '0d'}-{layout}"


def _copy(tree):
    return {k: _copy(v) if isinstance(v, dict) else np.array(v, copy=True) for k, v in tree.items()}


def _same(a, b):
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == np.asarray(b).tobytes()


def _check(shape, layout, variant, dtype="float64", **options):
    ns = load(shape, layout, variant, dtype)
    params, inputs = ns["setup"]()
    before = (_copy(params), _copy(inputs))
    report = gradprobe.probe(ns["forward"], ns["backward"], params, inputs, **options)
    assert _same(before[0], params) and _same(before[1], inputs), "the caller's arrays changed"
    return report


def _verdicts_hold(report, shape, variant):
    """Correct targets do not fail; the planted bug fails (an empty tensor has nothing wrong)."""
    status = {t.name: t.status for t in report.tensors}
    if variant in ("correct", "kinked"):
        assert "fail" not in status.values(), status
        return
    wrong = BUGGY[variant]
    if wrong == "m.w" and math.prod(shape) == 0:
        assert "fail" not in status.values(), status
        return
    assert status[wrong] == "fail", status
    assert all(s != "fail" for n, s in status.items() if n != wrong), status


@pytest.mark.parametrize("variant", VARIANTS)
@pytest.mark.parametrize(("shape", "layout"), SHAPES, ids=[_ids(*s) for s in SHAPES])
def test_every_shape_and_variant_at_the_default_path(shape, layout, variant):
    """Each shape/layout, correct or buggy, at default options: no exception, honest verdicts."""
    report = _check(shape, layout, variant)
    _verdicts_hold(report, shape, variant)
    gradprobe.report_dict(report)  # the JSON report builds
    gradprobe.render_text(report)


@pytest.mark.parametrize("path", list(PATHS))
@pytest.mark.parametrize("variant", ("correct", "kinked", "scalar", "element", "flat"))
@pytest.mark.parametrize(("shape", "layout"), FEW, ids=[_ids(*s) for s in FEW])
def test_every_path_on_odd_shapes(shape, layout, variant, path):
    """Re-estimates, no recheck, directions and directions-only checks on odd shapes."""
    report = _check(shape, layout, variant, **PATHS[path])
    if path != "sample-0":
        _verdicts_hold(report, shape, variant)
    elif variant in ("correct", "kinked"):
        assert "fail" not in {t.status for t in report.tensors}


@pytest.mark.parametrize("variant", ("correct", "kinked", "scalar", "element"))
@pytest.mark.parametrize(("shape", "layout"), FEW, ids=[_ids(*s) for s in FEW])
def test_float32_code_on_odd_shapes(shape, layout, variant):
    """float32 arrays take the float32 route (a wider run and the float32 code itself)."""
    report = _check(shape, layout, variant, "float32")
    _verdicts_hold(report, shape, variant)


def test_one_wrong_element_is_located_with_directions_only():
    """--sample 0: the directions find the tensor wrong and localisation names the element."""
    report = _check((3, 4), "fortran", "element", sample=0)
    w = report.tensor("m.w")
    assert w.status == "fail"
    assert element_index((3, 4)) in w.bad_indices or w.worst_index == element_index((3, 4))


@pytest.mark.parametrize("variant", ("correct", "element"))
def test_a_million_elements_sampled(variant):
    """A tensor of 10^6 elements (sampled): the correct one does not fail, the wrong element is found."""
    report = _check((1000, 1000), "c", variant)
    _verdicts_hold(report, (1000, 1000), variant)
    if variant == "element":
        w = report.tensor("m.w")
        assert element_index((1000, 1000)) in w.bad_indices or w.worst_index == element_index((1000, 1000))


@pytest.mark.parametrize("variant", ("correct", "scalar", "element"))
@pytest.mark.parametrize(("shape", "layout"), SHAPES, ids=[_ids(*s) for s in SHAPES])
def test_the_command_line_and_every_renderer(run_cli, tmp_path, shape, layout, variant):
    """gradprobe check --json --junit --html --map on every shape: the exit code follows the verdicts."""
    path = tmp_path / "target.py"
    path.write_text(source(shape, layout, variant))
    result = run_cli("check", str(path), "--json", "r.json", "--junit", "r.xml", "--html", "r.html", "--map")
    wrong = variant != "correct" and not (BUGGY[variant] == "m.w" and math.prod(shape) == 0)
    assert result.exit_code == (1 if wrong else 0), result.output
    data = json.loads((tmp_path / "r.json").read_text())
    statuses = {t["name"]: t["status"] for layer in data["layers"] for t in layer["tensors"]}
    assert (statuses.get(BUGGY.get(variant, "")) == "fail") == wrong
    ET.parse(tmp_path / "r.xml")
    assert "<html" in (tmp_path / "r.html").read_text().lower()


@pytest.mark.parametrize("variant", ("correct", "scalar"))
def test_worker_processes_with_a_0d_param(run_cli, tmp_path, variant):
    """--jobs 2 on a target whose 0-d param is right or wrong."""
    path = tmp_path / "target.py"
    path.write_text(source((2, 3), "fortran", variant))
    result = run_cli("check", str(path), "--jobs", "2", "--json", "-")
    assert result.exit_code == (0 if variant == "correct" else 1), result.output
    statuses = {t["name"]: t["status"] for layer in json.loads(result.stdout)["layers"] for t in layer["tensors"]}
    assert (statuses["t"] == "fail") == (variant == "scalar")


class _Temperature:
    """y = x / t with a 0-d param t: dy/dt = -x / t^2, dy/dx = 1 / t."""

    name = "temp"

    def __init__(self, slip: float = 1.0):
        self.slip = slip

    def forward(self, params, x, inputs):
        return x / params["t"]

    def backward(self, params, x, inputs, grad_y):
        t = params["t"]
        return {"t": self.slip * np.sum(-grad_y * x / (t * t))}, grad_y / t


class _Squared:
    """The loss sum((y - target)^2) / 2: d/dy = y - target."""

    name = "loss"

    def forward(self, params, x, inputs):
        return 0.5 * np.sum((x - inputs["y"]) ** 2)

    def backward(self, params, x, inputs, grad_y):
        return {}, grad_y * (x - inputs["y"])


@pytest.mark.parametrize("layout", ("c", "fortran", "broadcast"))
@pytest.mark.parametrize("slip", (1.0, 1.5))
def test_a_stack_with_a_0d_param(slip, layout):
    """A layer stack whose only param is 0-d: the wrong one is named where it enters."""
    rng = np.random.default_rng(5)
    x = rng.normal(size=(3, 4))
    x = {"c": x, "fortran": np.asfortranarray(x), "broadcast": np.broadcast_to(x[:1], x.shape)}[layout]
    params = {"temp": {"t": np.asarray(1.3)}}
    inputs = {"x": x, "y": rng.normal(size=(3, 4))}
    report = gradprobe.probe_stack([_Temperature(slip), _Squared()], params, inputs)
    assert report.error_enters_at == (() if slip == 1.0 else ("temp",))
    assert report.ok == (slip == 1.0)
    gradprobe.report_dict(report)
