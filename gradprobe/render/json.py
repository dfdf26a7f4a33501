"""The JSON report of the protocol (schema ``gradprobe.report/1``)."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

from ..report.model import (
    CoordinateDetail,
    DirectionResult,
    LayerResult,
    Report,
    TargetRun,
    TensorResult,
)
from ..common.status import Status

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


LISTED_COORDINATES = 256  # per tensor; beyond it, those with the largest relative errors


def _checked(t: TensorResult) -> dict[str, Any]:
    """The checked coordinates (all, or the worst LISTED_COORDINATES), so a later run can
    compare on the same ones and see whether its numeric derivatives moved (``--baseline``)."""
    c = t.coordinates
    if c is None or t.checked == 0 or len(c.flat) == 0:
        return {}
    keep = np.arange(len(c.flat))
    if keep.size > LISTED_COORDINATES:
        rel = np.where(np.isfinite(c.rel), c.rel, np.inf)
        keep = np.sort(np.argsort(-rel, kind="stable")[:LISTED_COORDINATES])
    shape = t.shape or (1,)
    indices = np.stack(np.unravel_index(np.asarray(c.flat, dtype=np.int64)[keep], shape), axis=1)
    return {"checked_coordinates": {
        "indices": indices[:, :len(t.shape)].tolist(),
        **{key: [_num(v) for v in np.asarray(values)[keep].tolist()]
           for key, values in (("rel_error", c.rel), ("noise", c.noise), ("numeric", c.numeric),
                               ("scale", c.scale))},
        "status": [Status.of_code(r).value for r in np.asarray(c.rank)[keep]],
    }}


def _baseline(t: TensorResult) -> dict[str, Any]:
    b = t.baseline
    if b is None:
        return {}
    return {"baseline": {
        "status": b.status.value if b.status is not None else None,
        "max_rel_error": _num(b.max_rel_error), "growth": _num(b.growth), "change": b.change.value,
        "floor": _num(b.floor), "compared_on": b.compared_on, "numeric_shift": _num(b.numeric_shift),
        "reason": b.reason,
    }}


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
        **_checked(t),
        **_baseline(t),
        **({"device": t.device} if t.device is not None else {}),
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
        "array_library": report.array_library,
        "gradient_source": report.gradient_source,
        "inconclusive_fails": report.inconclusive_fails,
        "sampling": {"sample": report.sample, "directions": report.directions},
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
        **_run_baseline(report),
        "second_order": _second_order(report),
    }


def _second_order(report: Report) -> dict[str, Any] | None:
    if report.second_order is None:
        return None
    from .second_json import second_order_dict  # second derivatives checked only: loaded then

    return second_order_dict(report.second_order)


def _run_baseline(report: Report) -> dict[str, Any]:
    b = report.baseline
    if b is None:
        return {}
    changes = [t.baseline.change.value for t in report.tensors if t.baseline is not None]
    changes += ["gone"] * len(b.gone)
    return {"baseline": {
        "path": b.path, "target": b.target, "growth_factor": b.growth_factor,
        "counts": {c: changes.count(c) for c in sorted(set(changes))},
        "gone": [{"name": t.name, "status": t.status.value, "max_rel_error": _num(t.max_rel_error)}
                 for t in b.gone],
    }}


def dumps(document: dict[str, Any]) -> str:
    """``document`` indented, with each list of ``checked_coordinates`` on one line (a list of
    256 numbers would otherwise take 256 lines)."""
    lists: list[str] = []

    def fold(value: Any) -> Any:
        if isinstance(value, dict):
            return {k: (_folded(v, lists) if k == "checked_coordinates" else fold(v))
                    for k, v in value.items()}
        if isinstance(value, list):
            return [fold(v) for v in value]
        return value

    text = json.dumps(fold(document), indent=2)
    for k, compact in enumerate(lists):
        text = text.replace(json.dumps(f"{FOLD}{k}"), compact, 1)
    return text + "\n"


FOLD = "\u0000folded-list-"  # a placeholder no report string holds (JSON escapes NUL)


def _folded(block: dict[str, Any], lists: list[str]) -> dict[str, Any]:
    out = {}
    for key, values in block.items():
        lists.append(json.dumps(values, separators=(", ", ": ")))
        out[key] = f"{FOLD}{len(lists) - 1}"
    return out


def render_json(report: Report) -> str:
    return dumps(report_dict(report))


def unrun_dict(run: TargetRun, threshold: float | None, seed: int,
               method: str | None = None) -> dict[str, Any]:
    """The report of one target that could not run: not ok, no layers, its sentence in
    ``errors``, so a CI step reading the file finds why instead of a missing file. It has
    every top-level and summary key of a report that ran (null where nothing was learnt)."""
    return {
        "schema": SCHEMA, "target": run.target, "ok": False, "exit_code": run.exit_code,
        "threshold": threshold, "seed": seed, "method": method, "compute_dtype": None,
        "narrow_threshold": None, "array_library": None, "gradient_source": None,
        "inconclusive_fails": None, "sampling": None,
        "summary": {"tensors": 0, "checked": 0, "failed": 0, "kinks": 0, "inconclusive": 0,
                    "failed_tensors": 0, "evaluations": 0, "seconds": 0.0,
                    "error_enters_at": None, "own_evaluations": None},
        "layers": [], "errors": [run.error or "the check could not run"], "notes": [],
        "second_order": None,
    }


def render_runs(runs: list[TargetRun], threshold: float | None = None, seed: int = 0,
                method: str | None = None) -> str:
    """One target: its report as above (or, when it could not run, :func:`unrun_dict`).
    Several: ``gradprobe.runs/1`` holding each report and each target's error."""
    if len(runs) == 1:
        run = runs[0]
        return (render_json(run.report) if run.report is not None
                else dumps(unrun_dict(run, threshold, seed, method)))
    document = {
        "schema": RUNS_SCHEMA,
        "ok": all(r.exit_code == 0 for r in runs),
        "exit_code": max(r.exit_code for r in runs),
        "reports": [report_dict(r.report) for r in runs if r.report is not None],
        "errors": [{"target": r.target, "exit_code": r.exit_code, "message": r.error}
                   for r in runs if r.report is None],
    }
    return dumps(document)
