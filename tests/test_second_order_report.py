"""The second_order object of the JSON report, the terminal's block table, JUnit testcases,
the HTML block map, the setting in every place, the samples, and bad Hessian outputs."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET

import pytest
from conftest import SAMPLES

from gradprobe import probe


def _json(run_cli, *args):
    result = run_cli("check", *args, "--json", "-")
    return result.exit_code, json.loads(result.stdout)


def test_json_object_of_section_7(run_cli):
    """Every key and value type of the protocol's example object, for the buggy sample."""
    code, report = _json(run_cli, str(SAMPLES / "claims_count_buggy.py"))
    so = report["second_order"]
    assert code == 1 and report["ok"] is False
    assert so["form"] == "hessian" and so["status"] == "fail"
    assert so["error_enters_at"] == "hessian" and so["symmetric"] == "pass"
    blocks = {(b["rows"], b["cols"]): b for b in so["blocks"]}
    assert set(blocks) == {(r, c) for r in ("rating.coef", "rating.base")
                           for c in ("rating.coef", "rating.base")}
    bad = blocks[("rating.coef", "rating.base")]
    assert bad["status"] == "fail" and bad["checked"] == 3 and bad["failed"] == 3
    assert isinstance(bad["max_rel_error"], float) and bad["max_rel_error"] > 0.5
    assert bad["worst_index"][0] in ([0], [1], [2]) and bad["worst_index"][1] == []
    assert "cross term" in bad["hint"]
    assert blocks[("rating.coef", "rating.coef")]["hint"] is None


def test_json_passing_sample_and_null_without_forms(run_cli):
    code, report = _json(run_cli, str(SAMPLES / "claims_count.py"))
    assert code == 0 and report["second_order"]["status"] == "pass"
    assert report["second_order"]["error_enters_at"] is None
    code, report = _json(run_cli, str(SAMPLES / "crop_yield.py"))
    assert code == 0 and report["second_order"] is None


def test_setting_off_skips_from_the_command_line_and_the_config(run_cli, tmp_path):
    code, report = _json(run_cli, str(SAMPLES / "claims_count_buggy.py"), "--second-order", "off")
    assert code == 0 and report["second_order"] is None
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\nsecond_order = "off"\n')
    code, report = _json(run_cli, str(SAMPLES / "claims_count_buggy.py"))
    assert code == 0 and report["second_order"] is None
    shown = run_cli("check", "--settings-in-force").output
    assert "second_order" in shown and "'off'" in shown
    (tmp_path / "pyproject.toml").write_text('[tool.gradprobe]\nsecond_order = "maybe"\n')
    result = run_cli("check", str(SAMPLES / "claims_count.py"))
    assert result.exit_code == 2 and "must be one of on, off" in result.output


def test_terminal_block_table_and_where_the_error_enters(run_cli):
    output = run_cli("check", str(SAMPLES / "reservoir_release_buggy.py")).output
    lines = [line.rstrip() for line in output.splitlines()]
    title = lines.index("second derivatives (hvp)")
    rows = {line.split()[0] + " × " + line.split()[2]: line for line in lines[title + 3:title + 12]}
    assert rows["rule.b × rule.b"].split()[-1] == "fail"
    assert rows["share × share"].split()[-1] == "pass"
    assert any(line.startswith("second derivatives: the error enters at the Hessian") for line in lines)
    assert lines[-1].startswith("DISAGREES · second derivatives: 3 of 9 Hessian blocks disagree")


def test_reservoir_samples(run_cli):
    code, report = _json(run_cli, str(SAMPLES / "reservoir_release.py"))
    assert code == 0 and report["second_order"]["status"] == "pass"
    code, report = _json(run_cli, str(SAMPLES / "reservoir_release_buggy.py"))
    failing = {(b["rows"], b["cols"]) for b in report["second_order"]["blocks"] if b["status"] == "fail"}
    assert code == 1 and failing == {("rule.a", "rule.b"), ("rule.b", "rule.a"), ("rule.b", "rule.b")}
    assert report["second_order"]["error_enters_at"] == "hessian"
    assert all(t["status"] == "pass" for layer in report["layers"] for t in layer["tensors"])


def test_junit_has_a_testcase_per_block(run_cli, tmp_path):
    run_cli("check", str(SAMPLES / "claims_count_buggy.py"), "--junit", "out.xml")
    suite = ET.parse(tmp_path / "out.xml").getroot().find("testsuite")
    cases = [c for c in suite.iter("testcase") if c.get("classname").endswith(".second_order")]
    assert len(cases) == 4 and int(suite.get("tests")) == 6 and int(suite.get("failures")) == 2
    failed = {c.get("name") for c in cases if c.find("failure") is not None}
    assert failed == {"rating.coef × rating.base", "rating.base × rating.coef"}


def test_html_block_map_and_failing_block_maps(run_cli, tmp_path):
    run_cli("check", str(SAMPLES / "claims_count_buggy.py"), "--html", "page.html")
    page = (tmp_path / "page.html").read_text()
    assert page.count('class="gp-block gp-') == 4 and "gp-blockmap" in page
    assert page.count('data-block="rating.coef × rating.base"') == 2  # its cell and its map
    assert 'id="block-0-' in page and "Second derivatives (hessian): fail" in page


def test_hvp_with_a_missing_entry_fails_that_row_tensor():
    from second_kit import SympyTarget

    target = SympyTarget("hvp")
    report = probe(target.forward, target.backward, target.setup()[0],
                   hvp=lambda p, i, v: {"weights": target.hvp(p, i, v)["weights"]})
    so = report.second_order
    assert not report.ok and {b.rows for b in so.failing_blocks} == {"mix"}
    assert so.errors == ("hvp returned no value for mix",)


def test_hvp_that_raises_is_exit_2(run_cli, write_target):
    path = write_target("""
        import numpy as np
        params = {"w": np.array([1.0, 2.0])}
        def forward(p, i): return float(np.sum(p["w"] ** 4))
        def backward(p, i): return {"w": 4 * p["w"] ** 3}
        def hvp(p, i, v): raise RuntimeError("not written yet")
    """)
    result = run_cli("check", str(path))
    assert result.exit_code == 2 and "hvp raised RuntimeError: not written yet" in result.output


def test_dense_hessian_of_the_wrong_side_is_exit_2(run_cli, write_target):
    path = write_target("""
        import numpy as np
        params = {"w": np.array([1.0, 2.0])}
        def forward(p, i): return float(np.sum(p["w"] ** 4))
        def backward(p, i): return {"w": 4 * p["w"] ** 3}
        def hessian(p, i): return np.eye(3)
    """)
    result = run_cli("check", str(path))
    assert result.exit_code == 2 and "must be (2, 2)" in result.output


def test_pytest_fixture_takes_the_setting(pytester):
    pytester.makeini("[pytest]\ngradprobe_second_order = off\n")
    pytester.makepyfile("""
        import numpy as np
        def test_it(grad_probe):
            p = {"w": np.array([1.0, 2.0])}
            report = grad_probe(lambda p, i: float(np.sum(p["w"] ** 4)),
                                lambda p, i: {"w": 4 * p["w"] ** 3}, p,
                                hvp=lambda p, i, v: {"w": 0 * v["w"]})
            assert report.second_order is None
        def test_on(grad_probe):
            p = {"w": np.array([1.0, 2.0])}
            grad_probe(lambda p, i: float(np.sum(p["w"] ** 4)),
                       lambda p, i: {"w": 4 * p["w"] ** 3}, p,
                       hvp=lambda p, i, v: {"w": 0 * v["w"]}, second_order="on")
    """)
    result = pytester.runpytest("-p", "no:cacheprovider", "-p", "no:hypothesispytest")
    result.assert_outcomes(passed=1, failed=1)


def test_pytest_failure_line_names_the_blocks():
    """A run failing on second derivatives alone says so in the failure's first line."""
    from second_kit import SympyTarget

    from gradprobe.render.lines import failure_line

    target = SympyTarget("hvp", hess_bug=lambda h: h * 1.5)
    report = probe(target.forward, target.backward, target.setup()[0], hvp=target.hvp)
    assert not report.ok and not report.failing_tensors
    line = failure_line(report)
    assert line.startswith("second derivatives fail (weights × weights") and "Hessian" in line


def test_a_missing_gradient_skips_second_derivatives_with_a_note(run_cli, write_target):
    path = write_target("""
        import numpy as np
        params = {"w": np.array([1.0, 2.0]), "b": np.array(0.5)}
        def forward(p, i): return float(np.sum(p["w"] ** 4) + p["b"] ** 2)
        def backward(p, i): return {"w": 4 * p["w"] ** 3}
        def hvp(p, i, v): return {"w": 12 * p["w"] ** 2 * v["w"], "b": 2 * v["b"]}
    """)
    code, report = _json(run_cli, str(path))
    assert code == 1 and report["second_order"] is None
    assert any("not checked: backward gives no usable gradient for b" in n for n in report["notes"])


def test_torch_target_gets_its_own_arrays_in_hvp(run_cli, write_target):
    """A PyTorch target's hvp receives torch tensors, v included, and its result is checked."""
    pytest.importorskip("torch")
    path = write_target("""
        import torch
        def setup():
            g = torch.Generator().manual_seed(3)
            return {"w": torch.randn(4, generator=g, dtype=torch.float64)}, {
                "x": torch.randn(10, 4, generator=g, dtype=torch.float64)}
        def forward(p, i):
            return torch.nn.functional.softplus(i["x"] @ p["w"]).sum()
        def backward(p, i):
            return {"w": i["x"].T @ torch.sigmoid(i["x"] @ p["w"])}
        def hvp(p, i, v):
            assert isinstance(v["w"], torch.Tensor)
            s = torch.sigmoid(i["x"] @ p["w"])
            return {"w": i["x"].T @ (s * (1 - s) * (i["x"] @ v["w"]))}
    """)
    code, report = _json(run_cli, str(path))
    assert code == 0 and report["second_order"]["status"] == "pass"
