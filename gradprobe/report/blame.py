"""Where the error enters: one stack report from the end-to-end check and the layers' own.

The chain rule makes a layer's wrong *input* gradient reach every layer before it, so the
end-to-end check fails their tensors although their own code is right. Each layer's backward
checked on its own says which layers are wrong; a tensor that fails end to end while its own
layer's check passes is marked as inheriting the error from the nearest later layer whose input
gradient is wrong. Pure: reports in, a report out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

from ..common.classes import dataclass
from .model import LayerResult, Report, TensorResult
from ..common.status import Status, worst
from ..common.tensors import INPUT_LAYER


@dataclass(frozen=True)
class OwnCheck:
    """One layer's backward checked on its own (``report`` None: nothing to perturb)."""

    name: str
    report: Report | None
    input_name: str  # the tensor that is the layer's input in that check


def stack_layer(name: str, layers: Sequence[str]) -> str | None:
    """The stack layer a tensor name belongs to (the longest layer name it starts with)."""
    found = [layer for layer in layers if name.startswith(layer + ".")]
    return max(found, key=len) if found else None


def _own_tensors(check: OwnCheck) -> tuple[TensorResult, ...]:
    if check.report is None:
        return ()
    return tuple(
        replace(t, layer=check.name, kind="input") if t.name == check.input_name
        else replace(t, layer=check.name)
        for t in check.report.tensors
    )


def _inherited(position: int, owns: Sequence[LayerResult]) -> str | None:
    """The nearest layer after ``position`` whose own input gradient is wrong."""
    for layer in owns[position + 1:]:
        if layer.input_gradient_wrong:
            return layer.name
    return None


def combine(end: Report, checks: Sequence[OwnCheck], seconds: float) -> Report:
    """The stack's report: end-to-end tensors grouped by stack layer, with each layer's own
    verdict, ``inherited_from`` on inherited failures, and ``error_enters_at``."""
    names = [c.name for c in checks]
    owns = []
    for check in checks:
        tensors = _own_tensors(check)
        owns.append(LayerResult(
            check.name, (), own=worst(t.status for t in tensors) if check.report is not None else None,
            own_tensors=tensors, own_input=check.input_name if check.report else None,
            own_evaluations=check.report.evaluations if check.report else 0))
    grouped: dict[str, list[TensorResult]] = {n: [] for n in names}
    others: dict[str, list[TensorResult]] = {}
    for t in end.tensors:
        layer = stack_layer(t.name, names) if t.kind == "param" else None
        position = names.index(layer) if layer is not None else -1
        if t.status is Status.FAIL and t.kind != "unknown":
            own_wrong = layer is not None and owns[position].own is Status.FAIL
            source = None if own_wrong else _inherited(position, owns)
            if source is not None:
                t = replace(t, inherited_from=source, hint=(
                    f"inherited: layer {source}'s input gradient is wrong"))
        if layer is not None:
            grouped[layer].append(replace(t, layer=layer))
        else:
            others.setdefault(t.layer, []).append(t)
    layers = [replace(own, tensors=tuple(grouped[own.name])) for own in owns]
    extra = sorted(others, key=lambda n: n == INPUT_LAYER)  # inputs last
    layers += [LayerResult(n, tuple(others[n])) for n in extra]
    own_reports = [(c.name, c.report) for c in checks if c.report is not None]
    own_evaluations = sum(r.evaluations for _, r in own_reports)
    return replace(
        end,
        layers=tuple(layers),
        evaluations=end.evaluations + own_evaluations,
        seconds=seconds,
        errors=end.errors + tuple(f"layer {name} on its own: {e}"
                                  for name, r in own_reports for e in r.errors),
        notes=end.notes + tuple(f"layer {name} on its own: {n}" for name, r in own_reports
                                for n in r.notes if n not in end.notes),
        error_enters_at=tuple(o.name for o in owns if o.own is Status.FAIL),
        own_evaluations=own_evaluations,
    )
