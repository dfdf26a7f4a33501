"""One check of one target, from loaded functions and arrays to a :class:`Report`."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np

from ..hints import Context as HintContext
from ..hints import Evidence, diagnose
from ..errors import ProbeError, TargetLoadError
from ..guard import guarded
from ..heap import keep_heap, release_heap
from ..options import CheckOptions, default_threshold
from ..report import LayerResult, Report, TensorResult
from ..target import Target
from ..tensors import INPUT_LAYER, Workspace, is_float, layer_of
from .coordinates import CoordinateOutcome
from .evaluate import Backend, Evaluator, LossFunction, Progress
from .offpoint import MOVE, SecondLook
from .point import Point, prepare
from ..status import KINK, Status
from .summary import problem_result, unknown_result
from .tensor_check import check_tensor, evidence_of, failed_later

if TYPE_CHECKING:
    from concurrent.futures import Executor


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
    pool = WorkerPool(target.spec or target.forward, ws, grad_output, options.jobs)
    return pool, pool.close


def _threshold_note(dtype: np.dtype, why: str) -> str:
    eps = float(np.finfo(dtype).eps)
    return (
        f"forward computes in {dtype}{why}: its rounding unit is {eps:.1e}, so central differences "
        f"are good to about {eps ** (2 / 3):.0e} relative at best, and the default threshold for "
        f"it is {default_threshold(dtype):g}"
    )


def _promoted_note(why: str, threshold: float) -> str:
    return (
        f"forward computes in float32{why}; forward and backward also run in float64, so "
        f"backward's float64 gradient was checked against float64 numeric derivatives at the "
        f"float32 values within {threshold:g}, and its float32 gradient against that float64 "
        f"gradient within 1e-2 (float32 rounding)"
    )


def hint_context(ws: Workspace) -> HintContext:
    """Batch sizes (inputs' leading dimensions), integer and float inputs, float params in order."""
    batches = tuple(ws.owners[n].shape[0] for n in ws.input_names if ws.owners[n].ndim >= 1)
    indices = {n: ws.owners[n] for n in ws.input_names
               if np.issubdtype(ws.owners[n].dtype, np.integer)}
    floats = {n: ws.owners[n] for n in ws.input_names if is_float(ws.owners[n])}
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
    keep_heap()
    try:
        with guarded("forward or backward"):
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
    started = clock()
    ws = Workspace(target.params, target.inputs)
    if not any(is_float(ws.owners[n]) for n in ws.param_names):
        raise TargetLoadError("the target has no floating-point params to check")
    evaluator = Evaluator(LossFunction(target.forward, ws, None), None, progress)
    point = prepare(target.forward, target.backward, ws, evaluator, options.seed)
    evaluator.backend, release = _backend(target, point.numerics.workspace, point.info.grad_output,
                                          options, executor)
    try:
        return _check_all(target, options, point, started, clock)
    finally:
        release()


def _second_look(
    target: Target, options: CheckOptions, point: Point, threshold: float,
    outcomes: dict[str, CoordinateOutcome], results: list[TensorResult], evidence: list[Evidence],
) -> str | None:
    """Kink coordinates checked again off the kinks (:mod:`.offpoint`); the results and
    evidence of tensors where some then fail are replaced in place. A note naming them, if
    any."""
    kinked = {n: o for n, o in outcomes.items() if np.any(o.status == KINK)}
    if not kinked:
        return None
    look = SecondLook(target.forward, target.backward, point, threshold, options.seed, options.method)
    point.keep_gradients(set())  # the check's own gradients are no longer needed: memory
    failed = look.settle(kinked)
    for name, outcome in failed.items():
        k = next(i for i, r in enumerate(results) if r.name == name)
        results[k] = failed_later(results[k], outcomes[name], outcome, point.ws.owners[name].dtype)
        j = next(i for i, e in enumerate(evidence) if e.name == name)
        evidence[j] = evidence_of(name, results[k].shape, outcome)
    if not failed:
        return None
    return (f"{', '.join(failed)}: coordinates on a kink here fail at points moved off the kinks "
            f"(every checked tensor moved by about {MOVE:.0e} of its scale); their numbers "
            f"are those points'")


def _check_all(
    target: Target, options: CheckOptions, point: Point, started: float, clock: Callable[[], float],
) -> Report:
    ws, evaluator, numerics, grads = point.ws, point.evaluator, point.numerics, point.grads
    compute_dtype = numerics.code_dtype
    notes = list(grads.notes)
    if numerics.analytic:
        threshold = options.threshold or default_threshold(np.dtype(np.float64))
        notes.append(_promoted_note(numerics.why, threshold))
    else:
        threshold = options.threshold or default_threshold(compute_dtype)
        if compute_dtype != np.float64:
            notes.append(_threshold_note(compute_dtype, numerics.why))
    point.measure(options.seed)
    total = sum(ws.owners[n].size for n in grads.values)
    results: list[TensorResult] = []
    evidence: list[Evidence] = []
    outcomes: dict[str, CoordinateOutcome] = {}
    for name in ws.names():
        layer = ws.layer(name)
        if name in grads.problems:
            results.append(problem_result(name, layer, ws.kind(name), ws.owners[name], grads.problems[name]))
        elif name in grads.values:
            owner = ws.owners[name]
            probe = point.probe(name, threshold)
            result, found, outcome = check_tensor(probe, options, total, owner.shape,
                                                  ws.layer(name), ws.kind(name), owner.dtype)
            results.append(result)
            evidence.append(found)
            outcomes[name] = outcome
            if outcome.note:
                notes.append(outcome.note)
    moved_note = _second_look(target, options, point, threshold, outcomes, results, evidence)
    if moved_note:
        notes.append(moved_note)
    hints = diagnose(evidence, hint_context(ws))
    results = [replace(r, hint=hints[r.name]) if r.name in hints and r.hint is None else r for r in results]
    for name, (shape, sentence) in grads.unknown.items():
        results.append(unknown_result(name, layer_of(name), shape, sentence))
    errors = [r.hint for r in results if r.checked == 0 and r.status is Status.FAIL and r.hint]
    return Report(
        target=target.label,
        threshold=threshold,
        seed=options.seed,
        layers=_group(results),
        evaluations=evaluator.count,
        seconds=clock() - started,
        method=options.method,
        compute_dtype=str(np.dtype(compute_dtype)),
        errors=tuple(errors),
        notes=tuple(notes),
        inconclusive_fails=options.inconclusive_fails,
    )

