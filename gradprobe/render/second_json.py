"""The ``second_order`` object of the JSON report (protocol section 7)."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from ..report.second import BlockResult, SecondOrderResult


def _num(value: float | None) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def _index(index: tuple[tuple[int, ...], tuple[int, ...]] | None) -> list[list[int]] | None:
    return None if index is None else [list(index[0]), list(index[1])]


def block_dict(b: BlockResult) -> dict[str, Any]:
    return {
        "rows": b.rows, "cols": b.cols, "status": b.status.value, "checked": b.checked,
        "failed": b.failed, "max_rel_error": _num(b.max_rel_error),
        "worst_index": _index(b.worst_index), "hint": b.hint,
        "size": b.size, "kinks": b.kinks, "inconclusive": b.inconclusive,
        "max_abs_error": _num(b.max_abs_error), "worst_noise": _num(b.worst_noise),
        "bad_indices": [_index(i) for i in b.bad_indices],
        "directions": b.directions, "directions_off": b.directions_off,
        "inconclusive_reason": b.reason,
    }


def second_order_dict(so: SecondOrderResult | None) -> dict[str, Any] | None:
    if so is None:
        return None
    forward = so.forward
    return {
        "form": so.form,
        "status": so.status.value,
        "error_enters_at": so.error_enters_at,
        "symmetric": so.symmetric.value,
        "blocks": [block_dict(b) for b in so.blocks],
        "symmetry_max_rel_error": _num(so.symmetry_max_rel_error),
        "asymmetric_pairs": [list(p) for p in so.asymmetric_pairs],
        "forward_check": None if forward is None else {
            "status": forward.status.value, "pairs": forward.pairs, "failed": forward.failed,
            "max_rel_error": _num(forward.max_rel_error), "resolution": _num(forward.resolution),
            "failing_pairs": [list(p) for p in forward.failing_pairs],
        },
        "backward_calls": so.backward_calls,
        "hessian_calls": so.hessian_calls,
        "evaluations": so.evaluations,
        "seconds": round(so.seconds, 6),
        "errors": list(so.errors),
        "notes": list(so.notes),
    }
