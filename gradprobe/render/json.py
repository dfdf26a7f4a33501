"""The JSON report of the protocol (schema ``gradprobe.report/1``)."""

from __future__ import annotations

import json
import math
from typing import Any

from ..report import (
    CoordinateDetail,
    DirectionResult,
    LayerResult,
    Report,
    TargetRun,
    TensorResult,
)

SCHEMA = "gradprobe.report/1"
RUNS_SCHEMA = "gradprobe.runs/1"


def _num(value: float | None) -> float | None:
    """JSON has no NaN or infinity: they become null."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


NUMBERS = ("analytic", "numeric", "error_estimate", "rel_error")


def _direction(d: DirectionResult) -> dict[str, Any]:
    return {**{k: _num(getattr(d, k)) for k in NUMBERS}, "ok": d.ok, "kink": d.kink,
            "evaluations": d.evaluations}


def _detail(c: CoordinateDetail) -> dict[str, Any]:
    return {"index": list(c.index), **{k: _num(getattr(c, k)) for k in NUMBERS},
            "status": c.status.value, "reason": c.reason}


def tensor_dict(t: TensorResult) -> dict[str, Any]:
    return {
        "name": t.name,
        "layer": t.layer,
        "kind": t.kind,
        "shape": list(t.shape),
        "dtype": t.dtype,
        "size": t.size,
        "checked": t.checked,
        "failed": t.failed,
        "kinks": t.kinks,
        "inconclusive": t.inconclusive,
        "max_abs_error": _num(t.max_abs_error),
        "max_rel_error": _num(t.max_rel_error),
        "max_error_estimate": _num(t.max_error_estimate),
        "worst_noise": _num(t.worst_noise),
        "worst_index": list(t.worst_index) if t.worst_index is not None else None,
        "bad_indices": [list(i) for i in t.bad_indices],
        "kink_indices": [list(i) for i in t.kink_indices],
        "status": t.status.value,
        "hint": t.hint,
        "inconclusive_reason": t.inconclusive_reason,
        "evaluations": t.evaluations,
        "details": [_detail(c) for c in t.details],
        "directions": [_direction(d) for d in t.directions],
        "located_evaluations": t.located_evaluations,
        **({"inherited_from": t.inherited_from} if t.inherited_from is not None else {}),
    }


def _own_check(layer: LayerResult) -> dict[str, Any] | None:
    """A stack layer's backward checked on its own (None for targets that are not stacks)."""
    if layer.own is None:
        return None
    return {
        "input": layer.own_input,
        "input_gradient_wrong": layer.input_gradient_wrong,
        "wrong_param_gradients": [t.name for t in layer.wrong_param_gradients],
        "evaluations": layer.own_evaluations,
        "tensors": [tensor_dict(t) for t in layer.own_tensors],
    }


def report_dict(report: Report) -> dict[str, Any]:
    return {
        "schema": SCHEMA,
        "target": report.target,
        "ok": report.ok,
        "threshold": report.threshold,
        "seed": report.seed,
        "method": report.method,
        "compute_dtype": report.compute_dtype,
        "narrow_threshold": report.narrow_threshold,
        "inconclusive_fails": report.inconclusive_fails,
        "summary": {
            "tensors": len(report.tensors),
            "checked": report.checked,
            "failed": report.failed,
            "kinks": report.kinks,
            "inconclusive": sum(t.inconclusive for t in report.tensors),
            "failed_tensors": len(report.failing_tensors),
            "evaluations": report.evaluations,
            "seconds": round(report.seconds, 6),
            "error_enters_at": (list(report.error_enters_at)
                                if report.error_enters_at is not None else None),
            "own_evaluations": report.own_evaluations if report.is_stack else None,
        },
        "layers": [
            {
                "name": layer.name,
                "ok": layer.ok,
                "max_rel_error": _num(layer.max_rel_error),
                "tensors": [tensor_dict(t) for t in layer.tensors],
                "own": layer.own,
                "own_check": _own_check(layer),
            }
            for layer in report.layers
        ],
        "errors": list(report.errors),
        "notes": list(report.notes),
    }


def render_json(report: Report) -> str:
    return json.dumps(report_dict(report), indent=2) + "\n"


def render_runs(runs: list[TargetRun]) -> str:
    """One target: its report as above. Several: ``gradprobe.runs/1`` holding each report."""
    if len(runs) == 1 and runs[0].report is not None:
        return render_json(runs[0].report)
    document = {
        "schema": RUNS_SCHEMA,
        "ok": all(r.exit_code == 0 for r in runs),
        "exit_code": max(r.exit_code for r in runs),
        "reports": [report_dict(r.report) for r in runs if r.report is not None],
        "errors": [{"target": r.target, "exit_code": r.exit_code, "message": r.error}
                   for r in runs if r.report is None],
    }
    return json.dumps(document, indent=2) + "\n"
