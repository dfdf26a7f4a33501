"""The report model: statuses, derived verdicts, and the inconclusive policy."""

from __future__ import annotations

from gradprobe import Status
from gradprobe.report.model import CoordinateDetail, LayerResult, Report, TensorResult


def _tensor(name: str, status: str, **extra) -> TensorResult:
    return TensorResult(name, "dense", "param", (3,), "float64", 3, 0, 0, status, **extra)


def _report(*tensors: TensorResult, fails: bool = False) -> Report:
    return Report("t.py", 1e-6, 0, (LayerResult("dense", tensors),), 10, 0.1,
                  inconclusive_fails=fails)


def test_plain_strings_become_statuses():
    """Engine code may still hand over strings; the model stores the enum."""
    assert _tensor("w", "kink").status is Status.KINK
    detail = CoordinateDetail((0,), 1.0, 1.1, 0.0, 0.1, "fail")
    assert detail.status is Status.FAIL


def test_inconclusive_is_ok_by_default():
    report = _report(_tensor("w", "pass"), _tensor("b", "inconclusive"))
    assert report.ok and report.blocking_tensors == ()


def test_inconclusive_fails_the_report_when_asked():
    report = _report(_tensor("w", "pass"), _tensor("b", "inconclusive"), fails=True)
    assert not report.ok
    assert [t.name for t in report.blocking_tensors] == ["b"]
    assert report.failing_tensors == ()


def test_the_verdict_line_names_inconclusive_tensors_that_fail_the_run():
    from gradprobe.render.lines import verdict

    report = _report(_tensor("w", "pass"), _tensor("b", "inconclusive"), fails=True)
    assert verdict(report) == (
        "DISAGREES · 1 of 2 inconclusive (set to fail the run): b · 10 evaluations in 0.10 s")


def test_the_report_model_does_not_import_its_renderers():
    """report.py depends on no renderer (the renderers depend on it)."""
    import ast
    from pathlib import Path

    import gradprobe.report.model as model

    tree = ast.parse(Path(model.__file__).read_text())
    imported = {node.module for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)}
    assert not any(name and "render" in name for name in imported)
