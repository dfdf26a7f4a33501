"""Evaluating batches of perturbations in other processes or on a cluster.

Two backends feed the one :class:`~gradprobe.engine.evaluate.Evaluator`:

- :class:`WorkerPool` (``--jobs N``): N processes, each of which loads the target from its
  entry point once and receives the private copies of the arrays once, at start-up.
- :class:`ExecutorBackend`: any ``concurrent.futures.Executor`` (Dask's
  ``Client.get_executor()`` included); every task carries the forward and the arrays, so
  the functions must be picklable (module-level functions; Dask also pickles closures).

Both split a batch into contiguous chunks and return the losses in order, so a parallel
report is identical to the serial one.
"""

from __future__ import annotations

import os
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any, Callable, Sequence

import numpy as np

from ..errors import ProbeError, UsageProblem, summarise
from ..tensors import Workspace
from .evaluate import LossFunction, Perturbation

CHUNKS_PER_WORKER = 4

_worker_loss: LossFunction | None = None  # set once in each worker process


def _chunks(items: Sequence[Perturbation], count: int) -> list[Sequence[Perturbation]]:
    count = max(1, min(count, len(items)))
    bounds = np.linspace(0, len(items), count + 1).round().astype(int)
    return [items[bounds[i] : bounds[i + 1]] for i in range(count)]


def _state(ws: Workspace) -> tuple[dict[str, Any], dict[str, Any]]:
    params, inputs, _ = ws.scratch_trees()
    return params, inputs


def _start_worker(spec: str, params: Any, inputs: Any, grad_output: np.ndarray | None) -> None:
    global _worker_loss
    from ..target import load_functions

    forward, _ = load_functions(spec)
    _worker_loss = LossFunction(forward, Workspace(params, inputs), grad_output)


def _gather(futures: list[Future]) -> list[float]:
    """The chunks' losses in order; failures of the machinery become one sentence."""
    try:
        return [value for f in futures for value in f.result()]
    except ProbeError:
        raise  # the user's forward failed in a worker: its own sentence
    except BrokenProcessPool as exc:
        raise UsageProblem(
            "the worker processes failed to start or died (a target that cannot be loaded "
            "again in a fresh process, or a crash); run without --jobs to see why"
        ) from exc
    except Exception as exc:
        if "pickle" in str(exc).lower() or "pickl" in type(exc).__name__.lower():
            raise UsageProblem(
                "forward cannot be sent to other processes (it is not picklable: "
                f"{summarise(exc)}); use a module-level function, or name the target by "
                "its entry point"
            ) from exc
        raise


def _evaluate(loss: LossFunction, chunk: Sequence[Perturbation]) -> list[float]:
    return [float(np.real(loss.at(p))) for p in chunk]


def _evaluate_in_worker(chunk: Sequence[Perturbation]) -> list[float]:
    assert _worker_loss is not None, "worker was not started"
    return _evaluate(_worker_loss, chunk)


def evaluate_payload(
    forward: Callable[..., Any], params: Any, inputs: Any, grad_output: np.ndarray | None,
    chunk: Sequence[Perturbation],
) -> list[float]:
    """One executor task: rebuild the loss from what the task carries, evaluate a chunk."""
    return _evaluate(LossFunction(forward, Workspace(params, inputs), grad_output), chunk)


class WorkerPool:
    """``jobs`` processes that each load ``spec`` once."""

    def __init__(self, spec: str, ws: Workspace, grad_output: np.ndarray | None, jobs: int) -> None:
        params, inputs = _state(ws)
        self.jobs = jobs
        self.pool = ProcessPoolExecutor(
            max_workers=jobs, initializer=_start_worker, initargs=(spec, params, inputs, grad_output)
        )

    def losses(self, perturbations: Sequence[Perturbation]) -> list[float]:
        futures = [self.pool.submit(_evaluate_in_worker, c)
                   for c in _chunks(perturbations, self.jobs * CHUNKS_PER_WORKER)]
        return _gather(futures)

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)


class ExecutorBackend:
    """Any ``concurrent.futures.Executor``; tasks carry the forward and the arrays."""

    def __init__(self, executor: Executor, forward: Callable[..., Any], ws: Workspace,
                 grad_output: np.ndarray | None, workers: int | None = None) -> None:
        self.executor = executor
        self.forward = forward
        self.params, self.inputs = _state(ws)
        self.grad_output = grad_output
        self.workers = workers or getattr(executor, "_max_workers", None) or os.cpu_count() or 2

    def losses(self, perturbations: Sequence[Perturbation]) -> list[float]:
        futures = [
            self.executor.submit(evaluate_payload, self.forward, self.params, self.inputs,
                                 self.grad_output, list(c))
            for c in _chunks(perturbations, self.workers * CHUNKS_PER_WORKER)
        ]
        return _gather(futures)
