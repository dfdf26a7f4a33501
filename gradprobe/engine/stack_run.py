"""Checking a stack: every layer's backward on its own, then the whole network end to end.

Both kinds of check are ordinary engine runs (:func:`~gradprobe.engine.runner.run_check`), so
kinks, sampling, directions, hints, float32, parallel evaluation and every renderer apply to
each; :func:`~gradprobe.report.blame.combine` makes one report of them.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import replace
from typing import TYPE_CHECKING, Any

from .evaluator import Progress
from .runner import run_check
from ..common.errors import ProbeError
from ..settings.options import CheckOptions
from ..report.model import Report
from ..targets.stack import StackTarget, end_to_end
from ..targets.target import Target

if TYPE_CHECKING:
    from concurrent.futures import Executor


def run_stack(
    st: StackTarget,
    options: CheckOptions | None = None,
    *,
    executor: Executor | None = None,
    progress: Progress | None = None,
    clock: Callable[[], float] = time.perf_counter,
) -> Report:
    """Check ``st``; ProbeError subclasses (naming the target) when the check cannot run."""
    from ..targets.framework_state import preserved

    with preserved(st.params, st.inputs):
        return _run_stack(st, options or CheckOptions(), executor, progress, clock)


def _run_stack(st: StackTarget, options: CheckOptions, executor: Executor | None,
               progress: Progress | None, clock: Callable[[], float]) -> Report:
    from ..report.blame import OwnCheck, combine  # stacks only: loaded then
    from ..targets.frameworks import frame_stack
    from ..targets.stack_split import base_activations, layer_targets

    started = clock()
    try:
        st, framing = frame_stack(st)
        activations = base_activations(st)
    except ProbeError as exc:
        raise exc.with_target(st.label)
    checks = []
    whole = replace(options, only=None, skip=None)  # a layer's own check names its own tensors
    for part in layer_targets(st, activations):
        report = None
        if part.checkable:
            report = run_check(part.target, whole, executor=executor, progress=progress,
                               clock=clock)
        checks.append(OwnCheck(part.name, report, part.input_name))
    end = run_check(end_to_end(st), options, executor=executor, progress=progress, clock=clock)
    report = framing.annotate(combine(end, checks, clock() - started))
    return replace(report, notes=st.notes + report.notes) if st.notes else report


def run_any(target: Target | StackTarget, options: CheckOptions | None = None,
            **kwargs: Any) -> Report:
    """Check a flat target or a stack."""
    if isinstance(target, StackTarget):
        return run_stack(target, options, **kwargs)
    return run_check(target, options, **kwargs)
