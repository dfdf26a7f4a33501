"""One check of one target, from loaded functions and arrays to a :class:`Report`."""

from __future__ import annotations

import time
from collections.abc import Callable
from functools import partial
from typing import TYPE_CHECKING

import numpy as np

from ..common.errors import ProbeError, TargetLoadError, UsageProblem
from ..common.guard import guarded
from ..common.heap import keep_heap, own_mappings, release_heap
from ..settings.options import CheckOptions
from ..report.model import LayerResult, Report, TensorResult
from ..common.status import FAIL, INCONCLUSIVE, Status
from ..targets.target import Target
from ..common.tensors import INPUT_LAYER, Workspace, is_float, layer_of
from .evaluate import LossFunction
from .evaluator import Backend, Evaluator, Progress
from .point import Point, prepare
from .preflight import confirm_deterministic
from .record import TensorRecord
from .tensor_check import check_tensor
from .promote import agreement
from .run_settings import resolved_settings

if TYPE_CHECKING:
    from ..hints import Context as HintContext
    from concurrent.futures import Executor

    from ..report.second import SecondOrderResult


def _backend(
    target: Target, ws: Workspace, grad_output: np.ndarray | None, options: CheckOptions,
    executor: Executor | None,
) -> tuple[Backend | None, Callable[[], None]]:
    """Where perturbations are evaluated, and how to release it afterwards."""
    if executor is None and options.jobs <= 1:
        return None, lambda: None
    from .parallel import ExecutorBackend, WorkerPool

    if executor is not None:
        return ExecutorBackend(executor, target.forward, ws, grad_output), lambda: None
    reload = partial(target.loader, target.spec) if target.loader and target.spec else None
    pool = WorkerPool(target.forward, ws, grad_output, options.jobs, reload=reload)
    return pool, pool.close


def hint_context(ws: Workspace) -> HintContext:
    """Batch sizes (inputs' leading dimensions), integer and float inputs, float params in order."""
    batches = tuple(ws.owners[n].shape[0] for n in ws.input_names if ws.owners[n].ndim >= 1)
    indices = {n: ws.owners[n] for n in ws.input_names
               if np.issubdtype(ws.owners[n].dtype, np.integer)}
    floats = {n: ws.owners[n] for n in ws.input_names if is_float(ws.owners[n])}
    from ..hints import Context as HintContext  # local: the hint rules load where one is drawn

    return HintContext(batch_sizes=batches, index_inputs=indices, inputs=floats,
                       param_names=tuple(n for n in ws.param_names if is_float(ws.owners[n])))


def _group(results: list[TensorResult]) -> tuple[LayerResult, ...]:
    layers: dict[str, list[TensorResult]] = {}
    for r in results:
        layers.setdefault(r.layer, []).append(r)
    ordered = sorted(layers, key=lambda name: name == INPUT_LAYER)  # inputs last, stable
    return tuple(LayerResult(name, tuple(layers[name])) for name in ordered)


def run_check(
    target: Target,
    options: CheckOptions | None = None,
    *,
    executor: Executor | None = None,
    progress: Progress | None = None,
    clock: Callable[[], float] = time.perf_counter,
) -> Report:
    """Check ``target``; ProbeError subclasses when the check cannot run.

    ``executor`` spreads the evaluations over any ``concurrent.futures.Executor`` (a Dask
    client's ``get_executor()`` included); ``options.jobs > 1`` starts worker processes.
    """
    from ..targets.framework_state import preserved  # local: the framework form of targets builds on this module

    keep_heap()
    try:
        with guarded("forward or backward"), preserved(target.params, target.inputs):
            return _run(target, options or CheckOptions(), executor, progress, clock)
    except ProbeError as exc:
        raise exc.with_target(target.label)
    finally:
        release_heap()


def _run(
    target: Target,
    options: CheckOptions,
    executor: Executor | None,
    progress: Progress | None,
    clock: Callable[[], float],
) -> Report:
    from ..targets.frameworks import frame

    started = clock()
    target, framing = frame(target)
    assert target.backward is not None  # framed: the framework's reverse mode where absent
    with own_mappings():  # the private copies live through the check: not amid the heap's holes
        ws = Workspace(target.params, target.inputs)
    if not any(is_float(ws.owners[n]) for n in ws.param_names):
        raise TargetLoadError("the target has no floating-point params to check")
    releases: list[Callable[[], None]] = []

    def backend(numeric_ws: Workspace, grad_output: np.ndarray | None) -> Backend | None:
        chosen, release = _backend(target, numeric_ws, grad_output, options, executor)
        releases.append(release)
        return chosen

    try:
        evaluator = Evaluator(LossFunction(target.forward, ws, None), None, progress)
        assert target.backward is not None  # framed: the framework's reverse mode where absent
        with own_mappings():  # a few calls; the float64 run and the gradients live through the check
            point = prepare(target.forward, target.backward, ws, evaluator, options.seed, backend=backend)
        release_heap()  # preflight's copies are gone: their pages back before the probing's
        report = _check_all(target, options, point, started, clock)
    finally:
        for release in releases:
            release()
    return framing.annotate(report)


def _records(point: Point, settings: CheckOptions) -> list[TensorRecord]:
    """A record per tensor the report names, in the report's order: the workspace's tensors
    with a gradient (checked, or failed for a problem), then gradients for unknown names;
    those that ``only``/``skip`` leave out are not named."""
    records = [r for r in _all_records(point) if settings.selects(r.name)]
    if not records:
        names = ", ".join(r.name for r in _all_records(point))
        raise UsageProblem(f"no tensor is left to check by only={settings.only!r} and "
                           f"skip={settings.skip!r}; the tensors are {names}",
                           fix="give patterns that match some of those names")
    return records


def _all_records(point: Point) -> list[TensorRecord]:
    ws, grads = point.ws, point.grads
    records = []
    for name in ws.names():
        if name in grads.problems or name in grads.values:
            owner = ws.owners[name]
            records.append(TensorRecord(name, ws.layer(name), ws.kind(name), tuple(owner.shape),
                                        str(owner.dtype), problem=grads.problems.get(name),
                                        problem_at=tuple(grads.problem_at.get(name, ()))))
    for name, (shape, sentence) in grads.unknown.items():
        records.append(TensorRecord(name, layer_of(name), "unknown", tuple(shape), "unknown",
                                    problem=sentence))
    return records


def _second_look(target: Target, settings: CheckOptions, point: Point,
                 records: list[TensorRecord]) -> str | None:
    """Kink coordinates checked again off the kinks (:mod:`.offpoint`), annotating the
    records of tensors where some then fail. A note naming them, if any."""
    kinked = [r for r in records if r.kinked]
    if not kinked:
        return None
    assert target.backward is not None  # framed in _run
    from .offpoint import MOVE, WIDE, SecondLook  # local: only where a coordinate sits at a kink

    look = SecondLook(target.forward, target.backward, point, settings)
    point.release()  # the check's own gradients and float64 run are no longer needed: memory
    release_heap()  # ... and their pages go back before the moved points' copies are made
    failed = look.settle(kinked)
    if not failed:
        return None
    wide = f", or {', '.join(look.wide_failed)} alone by about {WIDE:.2g}" if look.wide_failed else ""
    return (f"{', '.join(failed)}: coordinates on a kink here fail at points moved off the kinks "
            f"(every checked tensor moved by about {MOVE:.0e} of its scale{wide}); their numbers "
            f"are those points'")


def _hints(records: list[TensorRecord], ws: Workspace) -> dict[str, str]:
    """A hint per failing tensor where the evidence supports one. Every hint explains a
    failure, so where no checked coordinate fails none is drawn (nor are the rules loaded)."""
    if not any(r.final is not None and bool(np.any(r.final.status == FAIL)) for r in records):
        return {}
    from ..hints import diagnose

    evidence = [e for e in (r.evidence() for r in records) if e is not None]
    return diagnose(evidence, hint_context(ws))


def _check_all(
    target: Target, options: CheckOptions, point: Point, started: float, clock: Callable[[], float],
) -> Report:
    ws, grads = point.ws, point.grads
    settings, threshold_notes = resolved_settings(options, point.numerics)
    # What the report says of the numerics, read now: the second look lets go of them.
    code_dtype, promoted = point.numerics.code_dtype, bool(point.numerics.analytic)
    notes = list(grads.notes) + threshold_notes
    records = _records(point, settings)
    total = sum(ws.owners[r.name].size for r in records if r.name in grads.values)
    left_out = [n for n in ws.names() if (n in grads.values or n in grads.problems)
                and not settings.selects(n)]
    if left_out:
        notes.append(f"not checked (only/skip): {', '.join(left_out)}")
    for record in records:
        if record.problem is None:
            check_tensor(point.probe(record.name, settings.resolved_threshold), settings, total, record)
            if record.outcome is not None and record.outcome.note:
                notes.append(record.outcome.note)
    if any(r.final is not None and bool(np.any(r.final.status >= INCONCLUSIVE)) for r in records):
        confirm_deterministic(point.evaluator, point.numerics.f0, point.numerics.dtype, point.numerics.code_dtype)
    second = _second_order(target, settings, point, notes)
    moved_note = _second_look(target, settings, point, records)
    if moved_note:
        notes.append(moved_note)
    hints = _hints(records, ws)
    for record in records:
        if record.problem is None:
            record.hint = hints.get(record.name)
    results = [r.result() for r in records]
    errors = [r.hint for r in results if r.checked == 0 and r.status is Status.FAIL and r.hint]
    return Report(
        target=target.label,
        threshold=settings.resolved_threshold,
        seed=settings.seed,
        layers=_group(results),
        evaluations=point.evaluator.count,
        seconds=clock() - started,
        method=settings.method,
        compute_dtype=str(np.dtype(code_dtype)),
        errors=tuple(errors),
        notes=tuple(notes),
        inconclusive_fails=settings.inconclusive_fails,
        narrow_threshold=agreement(code_dtype) if promoted else None,
        second_order=second,
        sample=settings.sample,
        directions=settings.directions,
    )


def _second_order(target: Target, settings: CheckOptions, point: Point,
                  notes: list[str]) -> SecondOrderResult | None:
    """Check 2nd derivatives when the target gives them and the setting is on (section 7)."""
    if settings.second_order == "off" or not target.gives_second_derivatives:
        return None
    if point.info.grad_output is not None:
        notes.append("hvp and hessian are checked for a scalar loss only: forward returns an "
                     "array here, so they were not checked")
        return None
    if point.grads.problems:
        notes.append("hvp and hessian were not checked: backward gives no usable gradient for "
                     + ", ".join(point.grads.problems))
        return None
    from .second_order import check_second_order  # local: a first-order check starts lean

    return check_second_order(target, point.own_numerics(), settings, settings.resolved_threshold)
