"""Evaluating batches of perturbations in other processes or on a cluster.

Two backends feed the one :class:`~gradprobe.engine.evaluator.Evaluator`:

- :class:`WorkerPool` (``--jobs N``): N processes, each of which gets the forward (its entry
  point, loaded again in the worker, or the function itself) and the private copies of the
  arrays once, at start-up. A task then carries only the perturbations: which tensor, a
  ``slice`` or index array, and the changed values. Chunks go to whichever worker is idle,
  so a small dependent batch waits for no more than its slowest evaluation. Workers ignore
  Ctrl-C; the parent stops them at once when it is interrupted or fails.
- :class:`ExecutorBackend`: any ``concurrent.futures.Executor`` (Dask's
  ``Client.get_executor()`` included); every task carries the forward and the arrays, so
  the functions must be picklable (module-level functions; Dask also pickles closures).

Both return the losses in order, so a parallel report is identical to the serial one.
"""

from __future__ import annotations

import os
import pickle
import signal
import sys
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any, cast

import numpy as np

from ..common.errors import ProbeError, UsageProblem, summarise
from ..common.guard import guarded
from ..common.heap import keep_heap
from ..common.tensors import Workspace
from .evaluate import LossFunction, Perturbation

if TYPE_CHECKING:
    from concurrent.futures import Executor, Future
    from multiprocessing.connection import Connection

CHUNKS_PER_WORKER = 16  # small chunks: an idle worker waits at most one chunk per batch
TASKS_PER_EXECUTOR_WORKER = 4  # executor tasks carry the arrays: fewer, larger ones
STOP_GRACE = 0.5  # seconds a worker gets to leave on its own before it is terminated

DIED = ("the worker processes failed to start or died (a target that cannot be loaded again "
        "in a fresh process, or a crash); run without --jobs to see why")


def _chunks(items: Sequence[Perturbation], count: int) -> list[Sequence[Perturbation]]:
    count = max(1, min(count, len(items)))
    bounds = np.linspace(0, len(items), count + 1).round().astype(int)
    return [items[bounds[i] : bounds[i + 1]] for i in range(count)]


def _state(ws: Workspace) -> tuple[dict[str, Any], dict[str, Any]]:
    params, inputs, _ = ws.scratch_trees()
    return params, inputs


def _not_picklable(exc: BaseException) -> UsageProblem:
    return UsageProblem(
        "forward cannot be sent to other processes (it is not picklable: "
        f"{summarise(exc)}); use a module-level function, or name the target by its entry point")


def _evaluate(loss: LossFunction, chunk: Sequence[Perturbation]) -> list[float]:
    with guarded("forward"):
        return [float(np.real(loss.at(p))) for p in chunk]


def _portable(exc: BaseException) -> BaseException:
    """``exc`` if it survives pickling, else a UsageProblem with its sentence."""
    try:
        pickle.dumps(exc)
        return exc
    except Exception:
        return UsageProblem(f"a worker process failed: {summarise(exc)}")


def _worker_main(conn: Any, load: Callable[..., Any], reload: Callable[[], Callable[..., Any]] | None,
                 params: Any, inputs: Any, grad_output: np.ndarray | None) -> None:
    """A worker: build the loss once, then evaluate chunks until told to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    keep_heap()
    loss: LossFunction | None = None
    failure: BaseException | None = None
    try:
        forward = reload() if reload is not None else load
        loss = LossFunction(forward, Workspace(params, inputs), grad_output)
    except BaseException as exc:  # reported with the first task
        failure = exc
    while True:
        try:
            message = conn.recv()
        except (EOFError, OSError):
            return
        if message is None:
            return
        tag, chunk = message
        try:
            if failure is not None:
                raise failure
            assert loss is not None
            conn.send((tag, True, _evaluate(loss, chunk)))
        except BaseException as exc:
            conn.send((tag, False, _portable(exc)))


class WorkerPool:
    """``jobs`` processes holding the forward and the arrays; tasks carry perturbations only.

    ``load`` is the forward function (it must be picklable), unless ``reload`` is given: a
    picklable function of no arguments that rebuilds forward in the worker (from the
    target's entry point, without calling setup() again).
    """

    def __init__(self, load: Callable[..., Any], ws: Workspace,
                 grad_output: np.ndarray | None, jobs: int,
                 reload: Callable[[], Callable[..., Any]] | None = None) -> None:
        import multiprocessing

        if reload is None:
            try:
                pickle.dumps(load)
            except Exception as exc:
                raise _not_picklable(exc) from exc
        params, inputs = _state(ws)
        # JAX runs threads of its own, which a forked child would inherit locked: fresh
        # processes for it (its arrays cross the boundary as numpy, the target is loaded again).
        context = multiprocessing.get_context("spawn" if "jax" in sys.modules else None)
        self.jobs = jobs
        self.connections: list[Any] = []
        self.processes: list[Any] = []
        try:
            for _ in range(jobs):
                here, there = context.Pipe()
                # Not daemonic, so a forward may start processes of its own.
                process = context.Process(target=_worker_main,
                                          args=(there, None if reload else load, reload, params, inputs,
                                                grad_output))
                process.start()
                there.close()
                self.connections.append(here)
                self.processes.append(process)
        except BaseException as exc:
            self.terminate()
            if isinstance(exc, Exception) and "pickl" in f"{type(exc).__name__} {exc}".lower():
                raise _not_picklable(exc) from exc
            raise

    def losses(self, perturbations: Sequence[Perturbation]) -> list[float]:
        from multiprocessing.connection import Connection, wait

        chunks = _chunks(perturbations, self.jobs * CHUNKS_PER_WORKER)
        results: list[list[float] | None] = [None] * len(chunks)
        waiting = list(range(len(chunks)))[::-1]
        busy: dict[Connection, int] = {}
        idle: list[Connection] = list(self.connections)
        try:
            while waiting or busy:
                while waiting and idle:
                    conn = idle.pop()
                    tag = waiting.pop()
                    conn.send((tag, list(chunks[tag])))
                    busy[conn] = tag
                for ready in wait(list(busy)):
                    conn = cast(Connection, ready)
                    tag, ok, value = conn.recv()
                    del busy[conn]
                    idle.append(conn)
                    if not ok:
                        raise cast(BaseException, value)
                    results[tag] = cast("list[float]", value)
        except (EOFError, OSError, BrokenPipeError) as exc:
            self.terminate()
            raise UsageProblem(DIED) from exc
        except BaseException:
            self.terminate()  # an interrupt or the user's error: no worker keeps running
            raise
        return [v for chunk in results if chunk is not None for v in chunk]

    def close(self) -> None:
        """Ask the workers to leave; terminate any that do not within STOP_GRACE."""
        for conn in self.connections:
            try:
                conn.send(None)
            except (OSError, ValueError):
                pass
        for process in self.processes:
            process.join(STOP_GRACE)
        self.terminate()

    def terminate(self) -> None:
        """Stop every worker now (idempotent)."""
        for process in self.processes:
            if process.is_alive():
                process.terminate()
        for process in self.processes:
            process.join(STOP_GRACE)
            if process.is_alive():
                process.kill()
                process.join()
        for conn in self.connections:
            conn.close()
        self.processes, self.connections = [], []


def _gather(futures: list[Future]) -> list[float]:
    """The chunks' losses in order; failures of the machinery become one sentence."""
    from concurrent.futures.process import BrokenProcessPool

    try:
        return [value for f in futures for value in f.result()]
    except ProbeError:
        raise  # the user's forward failed in a worker: its own sentence
    except BrokenProcessPool as exc:
        raise UsageProblem(DIED) from exc
    except BaseException as exc:
        for f in futures:
            f.cancel()
        if isinstance(exc, Exception) and (
                "pickle" in str(exc).lower() or "pickl" in type(exc).__name__.lower()):
            raise _not_picklable(exc) from exc
        raise


def evaluate_payload(
    forward: Callable[..., Any], params: Any, inputs: Any, grad_output: np.ndarray | None,
    chunk: Sequence[Perturbation],
) -> list[float]:
    """One executor task: rebuild the loss from what the task carries, evaluate a chunk."""
    keep_heap()
    return _evaluate(LossFunction(forward, Workspace(params, inputs), grad_output), chunk)


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
            for c in _chunks(perturbations, self.workers * TASKS_PER_EXECUTOR_WORKER)
        ]
        return _gather(futures)
