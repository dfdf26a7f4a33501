"""JUnit XML: the required elements and attributes of the commonly used JUnit schema.

The schema in question is the one Ant's JUnit task writes and Jenkins reads (junit-10.xsd /
the "JUnit.xsd" of the Ant format); the required items below are from memory of it:
testsuite needs name, tests, failures, errors, time, timestamp and hostname and holds
properties, testcase*, system-out and system-err; testcase needs name, classname and time;
failure and error need message and type.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

from conftest import SAMPLES

SUITE_ATTRS = {"name", "tests", "failures", "errors", "time", "timestamp", "hostname"}
CASE_ATTRS = {"name", "classname", "time"}


def _validate(root: ET.Element) -> list[ET.Element]:
    assert root.tag == "testsuites"
    suites = root.findall("testsuite")
    for suite in suites:
        assert SUITE_ATTRS <= set(suite.attrib), suite.attrib
        assert float(suite.get("time")) >= 0 and "T" in suite.get("timestamp")
        children = [child.tag for child in suite]
        assert children[0] == "properties" and children[-2:] == ["system-out", "system-err"]
        assert set(children[1:-2]) <= {"testcase"}
        cases = suite.findall("testcase")
        assert int(suite.get("tests")) == len(cases)
        assert int(suite.get("failures")) == sum(1 for c in cases if c.find("failure") is not None)
        assert int(suite.get("errors")) == sum(1 for c in cases if c.find("error") is not None)
        for case in cases:
            assert CASE_ATTRS <= set(case.attrib)
            for problem in list(case):
                if problem.tag == "skipped":  # the schema's skipped carries an optional message
                    continue
                assert problem.tag in ("failure", "error") and {"message", "type"} <= set(problem.attrib)
    assert int(root.get("tests")) == sum(int(s.get("tests")) for s in suites)
    return suites


def test_a_failing_tensor_is_a_failing_testcase_naming_it(run_cli, tmp_path):
    result = run_cli("check", str(SAMPLES / "crop_yield_buggy.py"), "--junit", "out.xml")
    assert result.exit_code == 1
    (suite,) = _validate(ET.parse(tmp_path / "out.xml").getroot())
    failed = [c for c in suite.findall("testcase") if c.find("failure") is not None]
    assert [c.get("name") for c in failed] == ["out.W"]
    failure = failed[0].find("failure")
    assert "out.W" in failure.get("message") and "worst relative error" in failure.get("message")
    assert "worst index: [" in failure.text and "bad indices" in failure.text


def test_several_targets_and_one_that_cannot_run(run_cli, tmp_path):
    result = run_cli("check", str(SAMPLES / "crop_yield.py"), "missing.py", "--junit", "out.xml")
    assert result.exit_code == 2
    suites = _validate(ET.parse(tmp_path / "out.xml").getroot())
    assert [s.get("name") for s in suites] == [str(SAMPLES / "crop_yield.py"), "missing.py"]
    assert suites[0].get("failures") == "0" and "kink" in suites[0].find("system-out").text
    error = suites[1].find("testcase/error")
    assert suites[1].get("errors") == "1" and "no such file missing.py" in error.get("message")


def test_classnames_read_like_target_dot_layer(run_cli, tmp_path):
    result = run_cli("check", str(SAMPLES / "crop_yield_buggy.py"), "missing.py", "--junit", "out.xml")
    assert result.exit_code == 2
    suites = _validate(ET.parse(tmp_path / "out.xml").getroot())
    assert {c.get("classname") for c in suites[0].findall("testcase")} == {
        "crop_yield_buggy.hidden", "crop_yield_buggy.out", "crop_yield_buggy.inputs"}
    assert suites[1].find("testcase").get("classname") == "missing"


def test_classname_forms():
    from gradprobe.render.junit import classname

    assert classname("samples/crop_yield.py:case", "hidden") == "crop_yield.case.hidden"
    assert classname("nets.mlp:Case", "dense") == "nets.mlp.Case.dense"
    assert classname("nets/mlp.py", "dense") == "mlp.dense"


def _inconclusive_run(fails: bool):
    from gradprobe.report.model import LayerResult, Report, TargetRun, TensorResult

    sure = TensorResult("dense.W", "dense", "param", (2, 2), "float32", 4, 0, 0, "pass",
                        max_rel_error=1e-4)
    unsure = TensorResult("dense.b", "dense", "param", (2,), "float32", 2, 0, 0, "inconclusive",
                          inconclusive=1, worst_noise=0.03, max_rel_error=0.02)
    report = Report("nets.py", 1e-2, 0, (LayerResult("dense", (sure, unsure)),), 12, 0.5,
                    inconclusive_fails=fails)
    return TargetRun("nets.py", 1 if fails else 0, report=report)


def test_an_inconclusive_tensor_is_a_skipped_testcase_with_its_reason():
    from gradprobe.render.junit import render_junit

    root = ET.fromstring(render_junit([_inconclusive_run(False)], "2026-01-01T00:00:00", "host"))
    (suite,) = _validate(root)
    skipped = [c for c in suite.findall("testcase") if c.find("skipped") is not None]
    assert [c.get("name") for c in skipped] == ["dense.b"]
    assert skipped[0].find("skipped").get("message") == (
        "dense.b: inconclusive: 1 of 2 checked coordinates could not be told apart from numeric "
        "noise at threshold 0.01; numeric error estimate 0.03 relative")
    assert (suite.get("skipped"), suite.get("failures"), root.get("skipped")) == ("1", "0", "1")


def test_an_inconclusive_tensor_fails_when_the_run_says_so():
    from gradprobe.render.junit import render_junit

    root = ET.fromstring(render_junit([_inconclusive_run(True)], "2026-01-01T00:00:00", "host"))
    (suite,) = _validate(root)
    failure = suite.find("testcase[@name='dense.b']/failure")
    assert failure.get("type") == "inconclusive"
    assert (suite.get("skipped"), suite.get("failures")) == ("0", "1")
