"""One check of one target, from loaded functions and arrays to a :class:`Report`."""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Callable

import numpy as np

from ..diagnose import Evidence, HintContext, diagnose
from ..errors import ProbeError, TargetLoadError
from ..guard import guarded
from ..heap import keep_heap, release_heap
from ..options import CheckOptions, default_threshold
from ..report import LayerResult, Report, TensorResult
from ..target import Target
from ..tensors import INPUT_LAYER, Workspace, is_float, layer_of
from .evaluate import Backend, Evaluator, LossFunction, Progress
from .gradients import Gradients, validate
from .preflight import ForwardInfo, call_backward, inspect_forward
from .summary import problem_result, unknown_result
from .tensor import check_tensor

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


@dataclass(frozen=True)
class Context:
    """What every tensor's check shares."""

    evaluator: Evaluator
    workspace: Workspace
    f0: float
    compute_dtype: np.dtype
    threshold: float
    options: CheckOptions
    total: int  # coordinates of every tensor to be checked, for the sweep plan


def _threshold_note(dtype: np.dtype, why: str) -> str:
    eps = float(np.finfo(dtype).eps)
    return (
        f"forward computes in {dtype}{why}: its rounding unit is {eps:.1e}, so central differences "
        f"are good to about {eps ** (2 / 3):.0e} relative at best, and the default threshold for "
        f"it is {default_threshold(dtype):g}"
    )


def _compute_type(out_dtype: np.dtype, ws: Workspace) -> tuple[np.dtype, str]:
    """The type forward computes in: its result's, or its params' when those are coarser
    (float32 params whose loss is returned as a Python float still carry float32 noise)."""
    kinds = [ws.owners[n].dtype for n in ws.param_names if is_float(ws.owners[n])]
    coarsest = max(kinds, key=lambda d: np.finfo(d).eps)
    if np.finfo(coarsest).eps > np.finfo(out_dtype).eps:
        return np.dtype(coarsest), f" (its params are {coarsest}, though it returns {out_dtype})"
    return np.dtype(out_dtype), ""


def hint_context(ws: Workspace) -> HintContext:
    """Batch sizes (inputs' leading dimensions) and integer index inputs, for hints."""
    batches = tuple(ws.owners[n].shape[0] for n in ws.input_names if ws.owners[n].ndim >= 1)
    indices = {n: ws.owners[n] for n in ws.input_names
               if np.issubdtype(ws.owners[n].dtype, np.integer)}
    return HintContext(batch_sizes=batches, index_inputs=indices)


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
    rng = np.random.default_rng(options.seed)  # grad_output; tensors draw from their own
    loss = LossFunction(target.forward, ws, None)
    evaluator = Evaluator(loss, None, progress)
    info = inspect_forward(target.forward, ws, evaluator, rng)
    # Worker processes start (and load the target) while backward runs in this one.
    backend, release = _backend(target, ws, info.grad_output, options, executor)
    try:
        grads = validate(call_backward(target.backward, ws, info.grad_output), ws)
        evaluator.backend = backend
        return _check_all(target, options, ws, evaluator, info, grads, started, clock)
    finally:
        release()


def _check_all(
    target: Target, options: CheckOptions, ws: Workspace, evaluator: Evaluator,
    info: ForwardInfo, grads: Gradients, started: float, clock: Callable[[], float],
) -> Report:
    compute_dtype, why = _compute_type(info.out_dtype, ws)
    notes = list(grads.notes)
    from .precision import (
        narrower_compute_type,  # local: keeps the import graph acyclic
    )

    hidden = narrower_compute_type(evaluator, ws, info.f0, compute_dtype)
    if hidden is not None:
        compute_dtype, why = hidden.dtype, hidden.evidence
    threshold = options.threshold or default_threshold(compute_dtype)
    if compute_dtype != np.float64:
        notes.append(_threshold_note(compute_dtype, why))
    total = sum(ws.owners[n].size for n in grads.values)
    ctx = Context(evaluator, ws, info.f0, compute_dtype, threshold, options, total)
    results: list[TensorResult] = []
    evidence: list[Evidence] = []
    for name in ws.names():
        layer = ws.layer(name)
        if name in grads.problems:
            results.append(problem_result(name, layer, ws.kind(name), ws.owners[name], grads.problems[name]))
        elif name in grads.values:
            result, found = check_tensor(ctx, name, grads.values[name])
            results.append(result)
            evidence.append(found)
    hints = diagnose(evidence, hint_context(ws))
    results = [replace(r, hint=hints[r.name]) if r.name in hints and r.hint is None else r for r in results]
    for name, (shape, sentence) in grads.unknown.items():
        results.append(unknown_result(name, layer_of(name), shape, sentence))
    errors = [r.hint for r in results if r.checked == 0 and r.status == "fail" and r.hint]
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
