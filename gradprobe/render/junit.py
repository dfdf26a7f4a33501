"""JUnit XML: a testsuite per target, a testcase per tensor, so CI shows failing tensors."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import PurePath

from ..report.model import Report, TargetRun, TensorResult
from ..common.status import Status
from ..common.spec import is_file_spec, split_spec
from ..common.tensors import format_index
from ..common.wording import plural, verb


def classname(target: str, layer: str | None = None) -> str:
    """``samples/crop_yield.py:case`` and layer ``hidden`` -> ``crop_yield.case.hidden``.

    A file target is named by its file's stem (folders and ``.py`` dropped), a module by its
    dotted name; ``:NAME`` becomes ``.NAME``. CI systems group testcases by these dots.
    """
    location, attribute = split_spec(target)
    if is_file_spec(location):
        location = PurePath(location.replace("\\", "/")).stem
    base = location.strip("<>") + (f".{attribute}" if attribute else "")
    return f"{base}.{layer}" if layer else base


def _failure_message(t: TensorResult, threshold: float) -> str:
    if t.checked == 0 or t.max_rel_error is None or (t.failed == 0 and t.hint):
        return f"{t.name}: {t.hint}"  # a problem, or a tensor failed along a direction
    where = format_index(t.worst_index) if t.worst_index is not None else "-"
    return (f"{t.name}: {t.failed} of {plural(t.checked, 'checked coordinate')} "
            f"{verb(t.failed, 'disagrees', 'disagree')}; worst relative "
            f"error {t.max_rel_error:.3g} at {where} (threshold {threshold:g})")


def _failure_text(t: TensorResult) -> str:
    lines = [
        f"worst index: {format_index(t.worst_index) if t.worst_index is not None else '-'}",
        f"max relative error: {t.max_rel_error!r}",
        f"max absolute error: {t.max_abs_error!r}",
        f"bad indices: {[list(i) for i in t.bad_indices]}",
    ]
    if t.hint:
        lines.append(f"hint: {t.hint}")
    if t.inherited_from:
        lines.append(f"inherited from: {t.inherited_from}")
    return "\n".join(lines)


def _own_cases(report: Report) -> list[tuple[str, TensorResult]]:
    return [(layer.name, t) for layer in report.layers for t in layer.own_tensors]


def inconclusive_reason(t: TensorResult, threshold: float) -> str:
    """Why a tensor is inconclusive, in one sentence."""
    if t.inconclusive_reason or t.hint:
        return f"{t.name}: inconclusive: {t.inconclusive_reason or t.hint}"
    noise = f"; numeric error estimate {t.worst_noise:.3g} relative" if t.worst_noise is not None else ""
    return (f"{t.name}: inconclusive: {t.inconclusive} of {t.checked} checked coordinates could not "
            f"be told apart from numeric noise at threshold {threshold:g}{noise}")


def _testcase(suite: ET.Element, report: Report, t: TensorResult, classname_: str) -> None:
    share = report.seconds * t.evaluations / max(report.evaluations, 1)
    case = ET.SubElement(suite, "testcase", {"name": t.name, "classname": classname_, "time": f"{share:.6f}"})
    changed = t.baseline is not None and t.baseline.change.fails and t.baseline.reason
    if t.status is Status.FAIL:
        failure = ET.SubElement(case, "failure", {
            "message": _failure_message(t, report.threshold), "type": "gradient mismatch"})
        failure.text = _failure_text(t) + (f"\nbaseline: {t.baseline.reason}" if changed and t.baseline else "")
    elif changed and t.baseline is not None and t.baseline.reason:
        failure = ET.SubElement(case, "failure", {"message": t.baseline.reason, "type": "baseline regression"})
        failure.text = _failure_text(t) + f"\nbaseline: {t.baseline.reason}"
    elif t.status is Status.INCONCLUSIVE and report.inconclusive_fails:
        failure = ET.SubElement(case, "failure", {
            "message": inconclusive_reason(t, report.threshold), "type": "inconclusive"})
        failure.text = _failure_text(t)
    elif t.status is Status.INCONCLUSIVE:
        ET.SubElement(case, "skipped", {"message": inconclusive_reason(t, report.threshold)})


def _suite(root: ET.Element, run: TargetRun, index: int, timestamp: str, hostname: str) -> None:
    report = run.report
    tensors = report.tensors if report else ()
    blocking = report.blocking_tensors if report else ()
    changed = report.changed_for_worse if report else ()
    failing = [t for t in tensors if t in blocking or t in changed]
    own = _own_cases(report) if report else []
    own_failures = sum(1 for _, t in own if t.status is Status.FAIL)
    skipped = sum(1 for t in tensors if t.status is Status.INCONCLUSIVE and t not in failing)
    suite = ET.SubElement(root, "testsuite", {
        "name": run.target, "tests": str(len(tensors) + len(own) if report else 1),
        "failures": str(len(failing) + own_failures), "errors": "0" if report else "1",
        "skipped": str(skipped),
        "time": f"{report.seconds:.6f}" if report else "0", "timestamp": timestamp,
        "hostname": hostname, "id": str(index), "package": "gradprobe",
    })
    props = ET.SubElement(suite, "properties")
    if report:
        for name, value in (("threshold", f"{report.threshold:g}"), ("seed", str(report.seed)),
                            ("method", report.method), ("compute_dtype", report.compute_dtype),
                            ("evaluations", str(report.evaluations)),
                            ("array_library", report.array_library),
                            ("gradient_source", report.gradient_source)):
            ET.SubElement(props, "property", {"name": name, "value": value})
        for t in tensors:
            _testcase(suite, report, t, classname(run.target, t.layer))
        for layer, t in own:  # a stack layer's backward checked on its own
            _testcase(suite, report, t, classname(run.target, f"{layer}.own"))
        if report.second_order is not None:
            from .second_junit import second_order_cases

            added = second_order_cases(suite, report.second_order,
                                       classname(run.target, "second_order"),
                                       report.threshold, report.inconclusive_fails)
            for key, more in zip(("tests", "failures", "skipped"), added):
                suite.set(key, str(int(suite.get(key, "0")) + more))
    else:
        case = ET.SubElement(suite, "testcase", {"name": "load and run", "classname": classname(run.target), "time": "0"})
        error = ET.SubElement(case, "error", {"message": run.error or "", "type": "check could not run"})
        error.text = run.error or ""
    out = ET.SubElement(suite, "system-out")
    if report:
        notes = [f"{t.name}: {t.status.value}" for t in tensors
                 if t.status in (Status.KINK, Status.INCONCLUSIVE)]
        out.text = "\n".join(notes + list(report.notes)) or None
    ET.SubElement(suite, "system-err")


def render_junit(runs: list[TargetRun], timestamp: str, hostname: str) -> str:
    """The JUnit XML document for ``runs`` (``timestamp`` ISO 8601, without a time zone)."""
    root = ET.Element("testsuites", {"name": "gradprobe"})
    tests = failures = errors = skipped = 0
    seconds = 0.0
    for index, run in enumerate(runs):
        _suite(root, run, index, timestamp, hostname)
        suite = root[-1]
        tests += int(suite.get("tests", "0"))
        failures += int(suite.get("failures", "0"))
        errors += int(suite.get("errors", "0"))
        skipped += int(suite.get("skipped", "0"))
        seconds += float(suite.get("time", "0"))
    root.set("tests", str(tests))
    root.set("failures", str(failures))
    root.set("errors", str(errors))
    root.set("skipped", str(skipped))
    root.set("time", f"{seconds:.6f}")
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
