"""JUnit testcases for second derivatives: one per Hessian block, plus symmetry and the
forward check when they fail."""

from __future__ import annotations

import xml.etree.ElementTree as ET

from ..report.second import BlockResult, SecondOrderResult
from ..common.status import Status
from ..common.tensors import format_index


def _where(b: BlockResult) -> str:
    if b.worst_index is None:
        return "-"
    return f"{format_index(b.worst_index[0])} × {format_index(b.worst_index[1])}"


def _message(b: BlockResult, threshold: float) -> str:
    if b.checked == 0 and b.hint:
        return f"{b.name}: {b.hint}"
    rel = "-" if b.max_rel_error is None else f"{b.max_rel_error:.3g}"
    return (f"{b.name}: {b.failed} of {b.checked} compared elements disagree"
            f"{f', {b.directions_off} of {b.directions} directions off' if b.directions_off else ''}; "
            f"worst relative error {rel} at {_where(b)} (threshold {threshold:g})")


def second_order_cases(suite: ET.Element, so: SecondOrderResult, classname: str,
                       threshold: float, inconclusive_fails: bool) -> tuple[int, int, int]:
    """Add the testcases; (tests, failures, skipped) added."""
    tests = failures = skipped = 0
    for b in so.blocks:
        tests += 1
        case = ET.SubElement(suite, "testcase", {"name": b.name, "classname": classname, "time": "0"})
        if b.status is Status.FAIL or (b.status is Status.INCONCLUSIVE and inconclusive_fails):
            failures += 1
            kind = "hessian mismatch" if b.status is Status.FAIL else "inconclusive"
            failure = ET.SubElement(case, "failure", {"message": _message(b, threshold), "type": kind})
            failure.text = "\n".join(
                [f"bad indices: {[[list(i), list(j)] for i, j in b.bad_indices]}"]
                + ([f"hint: {b.hint}"] if b.hint else [])
                + ([f"error enters at: {so.error_enters_at}"] if so.error_enters_at else []))
        elif b.status is Status.INCONCLUSIVE:
            skipped += 1
            ET.SubElement(case, "skipped", {"message": f"{b.name}: inconclusive: {b.reason}"})
    extra = []
    if so.symmetric is Status.FAIL:
        pairs = ", ".join(f"{r} × {c}" for r, c in so.asymmetric_pairs)
        extra.append(("symmetry", f"u·(Hv) differs from v·(Hu) for {pairs}"))
    if so.error_enters_at == "gradient" and not so.failing_blocks:
        extra.append(("forward second differences",
                      "the Hessian agrees with backward's derivative but not with forward's "
                      "second differences: the error enters at the gradient"))
    for name, message in extra:
        tests += 1
        failures += 1
        case = ET.SubElement(suite, "testcase", {"name": name, "classname": classname, "time": "0"})
        ET.SubElement(case, "failure", {"message": message, "type": "hessian mismatch"})
    return tests, failures, skipped
