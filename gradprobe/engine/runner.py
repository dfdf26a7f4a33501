"""One check of one target, from loaded functions and arrays to a :class:`Report`."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

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
from .noise import measured_loss_scale
from .preflight import ForwardInfo, call_backward, inspect_forward
from .probe import ROUNDING_UNITS, TensorProbe
from .promote import FLOAT32_AGREEMENT, promote
from .sampling import tensor_rng
from .summary import problem_result, unknown_result
from .tensor_check import check_tensor

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


def _compute_type(out_dtype: np.dtype, ws: Workspace) -> tuple[np.dtype, str]:
    """The type forward computes in: its result's, or its params' when those are coarser
    (float32 params whose loss is returned as a Python float still carry float32 noise)."""
    kinds = [ws.owners[n].dtype for n in ws.param_names if is_float(ws.owners[n])]
    coarsest = max(kinds, key=lambda d: np.finfo(d).eps)
    if np.finfo(coarsest).eps > np.finfo(out_dtype).eps:
        return np.dtype(coarsest), f" (its params are {coarsest}, though it returns {out_dtype})"
    return np.dtype(out_dtype), ""


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
    rng = np.random.default_rng(options.seed)  # grad_output; tensors draw from their own
    loss = LossFunction(target.forward, ws, None)
    evaluator = Evaluator(loss, None, progress)
    info = inspect_forward(target.forward, ws, evaluator, rng)
    grads = validate(call_backward(target.backward, ws, info.grad_output), ws)
    numerics = _numerics(target, ws, evaluator, info, grads)
    evaluator.backend, release = _backend(target, numerics.workspace, info.grad_output, options, executor)
    try:
        return _check_all(target, options, ws, evaluator, numerics, grads, started, clock)
    finally:
        release()


@dataclass(frozen=True)
class Numerics:
    """Where the numeric side works: the workspace perturbed, its base loss and type."""

    workspace: Workspace
    f0: float
    dtype: np.dtype  # the type the numeric side computes in
    code_dtype: np.dtype  # the type the user's code computes in
    analytic: dict[str, np.ndarray]  # the float64 run's gradients, for float32 code promoted
    float32: dict[str, np.ndarray]  # the float32 gradients those replace
    why: str  # how the code's type was found, for the note
    terms: float = 0.0  # the size of the terms the loss is summed from (ForwardInfo.terms)


def _numerics(target: Target, ws: Workspace, evaluator: Evaluator, info: ForwardInfo,
              grads: Gradients) -> Numerics:
    """The code's compute type (3 calls to look for hidden float32), and float64 numerics
    for float32 code that accepts float64 (1 forward and 1 backward call)."""
    dtype, why = _compute_type(info.out_dtype, ws)
    from .precision import (
        narrower_compute_type,  # local: keeps the import graph acyclic
    )

    hidden = narrower_compute_type(evaluator, ws, info.f0, dtype)
    if hidden is not None:
        dtype, why = hidden.dtype, hidden.evidence
    if dtype == np.float32:
        promoted = promote(evaluator, target.backward, ws, grads, info.f0)
        if promoted is not None:
            evaluator.loss = promoted.loss
            return Numerics(promoted.workspace, promoted.f0, np.dtype(np.float64), dtype,
                            promoted.analytic, promoted.float32, why, info.terms)
    return Numerics(ws, info.f0, dtype, dtype, {}, {}, why, info.terms)


def _float32_probe(
    evaluator: Evaluator, numerics: Numerics, ws: Workspace, name: str, grads: Gradients
) -> TensorProbe | None:
    """For float32 code checked on its float64 run: the tensor probed on the float32 code,
    serially, for the coordinates whose float32 gradient leaves its float64 run."""
    if name not in numerics.float32:
        return None
    own = evaluator.sibling(LossFunction(evaluator.loss.forward, ws, evaluator.loss.grad_output))
    f0 = own.base()
    return TensorProbe(own, name, ws.owners[name].reshape(-1), numerics.float32[name], f0,
                       np.dtype(np.float32), FLOAT32_AGREEMENT)


def _check_all(
    target: Target, options: CheckOptions, ws: Workspace, evaluator: Evaluator,
    numerics: Numerics, grads: Gradients, started: float, clock: Callable[[], float],
) -> Report:
    compute_dtype = numerics.code_dtype
    notes = list(grads.notes)
    if numerics.analytic:
        threshold = options.threshold or default_threshold(np.dtype(np.float64))
        notes.append(_promoted_note(numerics.why, threshold))
    else:
        threshold = options.threshold or default_threshold(compute_dtype)
        if compute_dtype != np.float64:
            notes.append(_threshold_note(compute_dtype, numerics.why))
    gradients = {n: numerics.analytic.get(n, g.reshape(-1)) for n, g in grads.values.items()}
    loss_scale = max(numerics.terms, measured_loss_scale(
        evaluator, numerics.workspace, gradients, numerics.f0, ROUNDING_UNITS,
        tensor_rng(options.seed, "", "noise")))
    total = sum(ws.owners[n].size for n in grads.values)
    target_scale = max((float(np.sqrt(np.mean(g**2))) for g in grads.values.values() if g.size), default=0.0)
    results: list[TensorResult] = []
    evidence: list[Evidence] = []
    for name in ws.names():
        layer = ws.layer(name)
        if name in grads.problems:
            results.append(problem_result(name, layer, ws.kind(name), ws.owners[name], grads.problems[name]))
        elif name in grads.values:
            owner = ws.owners[name]
            probe = TensorProbe(evaluator, name, numerics.workspace.owners[name].reshape(-1),
                                gradients[name], numerics.f0, numerics.dtype, threshold, target_scale,
                                loss_scale=loss_scale,
                                float32=_float32_probe(evaluator, numerics, ws, name, grads))
            result, found, outcome = check_tensor(probe, options, total, owner.shape,
                                                  ws.layer(name), ws.kind(name), owner.dtype)
            results.append(result)
            evidence.append(found)
            if outcome.note:
                notes.append(outcome.note)
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

