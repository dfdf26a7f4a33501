"""The HTML report's structure: self-contained, one map per failing tensor, the log colour
scale, small maps for large tensors, and the --html option and setting."""

from __future__ import annotations

import re
from dataclasses import replace
from html.parser import HTMLParser

import numpy as np
import pytest
from conftest import SAMPLES
from html_pages import FAILING, targets

from gradprobe.render.html import render_html
from gradprobe.render.svgmap import (
    LEVELS,
    MAX_COLS,
    MAX_ROWS,
    WITHIN,
    levels,
    tensor_svg,
)
from gradprobe.report.model import LayerResult, Report, TargetRun, TensorResult


class Tags(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def parse(page: str) -> list[tuple[str, dict[str, str | None]]]:
    parser = Tags()
    parser.feed(page)
    return parser.tags


def _tensor(name: str, errors: np.ndarray, status: str = "fail", **more) -> TensorResult:
    return TensorResult(name=name, layer=name.rpartition(".")[0] or name, kind="param",
                        shape=errors.shape, dtype="float64", checked=int(np.isfinite(errors).sum()),
                        failed=1, kinks=0, status=status, max_rel_error=float(np.nanmax(errors)),
                        error_map=errors, **more)


def _report(*tensors: TensorResult, target: str = "nets/mlp.py") -> Report:
    layers: dict[str, list[TensorResult]] = {}
    for t in tensors:
        layers.setdefault(t.layer, []).append(t)
    return Report(target=target, threshold=1e-6, seed=0, evaluations=10, seconds=0.1,
                  layers=tuple(LayerResult(k, tuple(v)) for k, v in layers.items()))


def test_a_run_is_one_self_contained_page_with_a_map_per_failing_tensor(run_cli, write_target, tmp_path):
    result = run_cli("check", *targets(write_target), "--html", "run.html")
    assert result.exit_code == 1
    page = (tmp_path / "run.html").read_text()
    tags = parse(page)
    names = [tag for tag, _ in tags]
    assert not {"script", "link", "img", "iframe", "object", "embed"} & set(names)
    assert all(attrs.get("href", "#").startswith("#") and "src" not in attrs for _, attrs in tags)
    assert re.findall(r"https?://[^\"' ]+", page) == ["http://www.w3.org/2000/svg"] * page.count("xmlns=")
    assert re.findall(r"url\((?!#)", page) == []  # only references to the page's own patterns
    figures = [attrs["data-tensor"] for tag, attrs in tags if tag == "figure"]
    assert sorted(figures) == sorted(FAILING)
    ids = [attrs["id"] for _, attrs in tags if "id" in attrs]
    assert len(ids) == len(set(ids))
    assert page.count('<section class="target"') == 3
    assert "reproduce with" in page and "--seed 0" in page
    assert "FAIL: 2 of 3 targets not ok, 2 failing tensors" in page


def test_the_colour_scale_is_by_decade_over_the_threshold():
    rel = np.array([np.nan, 1e-9, 1e-6, 1.5e-6, 9.9e-6, 1e-5, 0.5, 2.0, 1e9])
    assert levels(rel, 1e-6).tolist() == [-2, -1, -1, 0, 0, 1, 5, 6, 7]


def _lightness(colour: str) -> float:
    """CIE 1976 L* of an sRGB colour (sRGB transfer function of IEC 61966-2-1, Y from the
    Rec. 709 primaries: 0.2126, 0.7152, 0.0722; formulas from memory, common practice)."""
    channels = [int(colour[k:k + 2], 16) / 255 for k in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    y = 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]
    return 116 * y ** (1 / 3) - 16 if y > (6 / 29) ** 3 else y * (29 / 3) ** 3


def test_the_palette_reads_in_greyscale():
    """Each level is darker than the one before by a visible step, so the scale survives
    greyscale print and does not depend on telling hues apart."""
    values = [_lightness(c) for c in (WITHIN, *LEVELS)]
    steps = np.diff(values)
    assert np.all(steps < -5), values


def test_a_large_tensor_map_is_reduced_and_keeps_an_isolated_error():
    errors = np.full((1000, 800), 1e-10)
    errors[417, 23] = 0.3
    picture = tensor_svg(_tensor("layer1.W", errors), 1e-6)
    rows, cols = map(int, re.search(r'viewBox="0 0 (\d+) (\d+)"', picture.svg).groups()[::-1])
    assert rows <= MAX_ROWS and cols <= MAX_COLS and picture.block == (16, 7)
    # 0.3 is 3e5 x the threshold: decade 5, one cell at row 417 // 16, column 23 // 7
    assert re.search(r'class="gp-l5" fill="[^"]+" d="M3 26h1v1h-1z"', picture.svg)
    assert len(picture.svg) < 4000


def test_small_tensors_are_drawn_element_by_element_and_folds_are_marked():
    errors = np.full((3, 4, 5), 1e-9)
    errors[1, :, 2] = 0.5
    picture = tensor_svg(_tensor("field.K", errors), 1e-6)
    assert picture.block == (1, 1) and 'viewBox="0 0 5 12"' in picture.svg
    assert "".join(f"M2 {r}h1v1h-1z" for r in range(4, 8)) in picture.svg
    assert 'class="gp-fold"' in picture.svg and "M0 4h5M0 8h5" in picture.svg


def test_names_are_escaped_and_problems_without_a_map_are_said():
    odd = _tensor("w<b>", np.array([0.5, 1e-9]))
    missing = TensorResult(name="bias", layer="bias", kind="param", shape=(3,), dtype="float64",
                           checked=0, failed=0, kinks=0, status="fail", hint="backward returns no gradient for bias")
    page = render_html(_report(odd, missing))
    assert "w<b>" not in page and "w&lt;b&gt;" in page
    assert "no map, nothing was compared (backward returns no gradient for bias)" in page


def test_stack_attributes_are_shown_when_the_model_has_them():
    report = _report(_tensor("dense.W", np.array([[0.5, 1e-9]])), _tensor("out.W", np.array([[0.2]])))
    assert "error enters at" not in render_html(report)
    object.__setattr__(report, "error_enters_at", ("dense",))
    inherited = replace(report.layers[1].tensors[0])
    object.__setattr__(inherited, "inherited_from", "dense")
    object.__setattr__(report.layers[1], "own", "pass")
    report = replace(report, layers=(report.layers[0], replace(report.layers[1], tensors=(inherited,))))
    object.__setattr__(report, "error_enters_at", ("dense",))
    page = render_html(report)
    assert "<strong>error enters at dense: " in page
    assert "fails end to end only because the error enters in layer dense" in page


def test_a_stack_page_says_why_a_layer_is_wrong_and_draws_no_empty_tables():
    """The buggy shop-demand stack: the trend layer's input gradient is wrong, its params agree."""
    from gradprobe import probe_target

    report = probe_target(str(SAMPLES / "shop_demand_stack_buggy.py"))
    page = render_html(report)
    assert "error enters at trend: its input gradient is wrong" in page
    assert "its own backward: fail (its input gradient is wrong" in page
    assert '<table class="layer"><thead><tr><th scope="col">tensor</th>' in page
    assert page.count('<table class="layer">') == sum(1 for layer in report.layers if layer.tensors)
    assert "no params of its own" in page  # the relu layer


def test_html_setting_in_pyproject_and_an_unwritable_path(run_cli, write_target, tmp_path):
    marker = tmp_path / "imported"
    target = write_target(f"open({str(marker)!r}, 'w').close()\n" + (
        "import numpy as np\nparams = {'w': np.ones(2)}\n"
        "def forward(p, i):\n    return float((p['w'] ** 2).sum())\n"
        "def backward(p, i):\n    return {'w': 2 * p['w']}\n"))
    result = run_cli("check", str(target), "--html", "missing/run.html")
    assert result.exit_code == 2 and not marker.exists()  # refused before the check started
    assert result.output.strip().splitlines()[-1] == (
        "gradprobe: error: cannot write the HTML report to missing/run.html "
        "(the folder missing does not exist); name a file in a folder you can write to.")
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\nhtml = "from-config.html"\n')
    assert run_cli("check", str(target)).exit_code == 0
    page = (tmp_path / "from-config.html").read_text()
    assert "ok: every tensor of 1 target agrees" in page and "<figure" not in page


@pytest.mark.parametrize("count", [1, 2])
def test_runs_that_could_not_run_are_listed(count):
    runs = [TargetRun(f"nets/broken{k}.py", 2, error=f"nets/broken{k}.py: no such file.") for k in range(count)]
    page = render_html(runs)
    assert page.count("could not run: nets/broken") == count
    assert f"FAIL: {count} of {count} target" in page


def test_the_reproducing_command_states_what_differs_from_the_defaults():
    from gradprobe.settings.options import SETTINGS
    from gradprobe.settings.report_files import reproduce

    DEFAULTS = {s.name: s.default for s in SETTINGS}

    values = {**DEFAULTS, "threshold": 1e-5, "seed": 3, "sample": 100, "recheck": False, "jobs": 4}
    assert reproduce(["nets/mlp.py", "my nets/conv.py:case"], values, DEFAULTS) == (
        "gradprobe check nets/mlp.py 'my nets/conv.py:case' --fail-above 1e-05 --sample 100 "
        "--seed 3 --no-recheck")


def test_kink_coordinates_are_drawn_within_the_threshold_and_outlined():
    errors = np.full((2, 3), 1e-9)
    errors[0, 0] = 0.4  # a failure
    errors[1, 2] = 50.0  # at a kink: its one-sided slopes bracket the analytic value
    t = replace(_tensor("relu.W", errors), kinks=1, kink_indices=((1, 2),))
    picture = tensor_svg(t, 1e-6)
    assert re.search(r'class="gp-l5" fill="[^"]+" d="M0 0h1v1h-1z"', picture.svg)
    assert "gp-l7" not in picture.svg  # 50 would be decade 7 had the kink rule not judged it
    assert 'class="gp-kink"' in picture.svg and "M2.15 1.15h0.7" in picture.svg
    assert t.error_map[1, 2] == 50.0  # the report's own array is untouched
