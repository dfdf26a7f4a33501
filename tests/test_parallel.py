"""Worker processes: same losses as in process, nothing left running afterwards."""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe import UsageProblem
from gradprobe.engine.evaluate import LossFunction, Perturbation
from gradprobe.engine.parallel import WorkerPool
from gradprobe.common.tensors import Workspace


def weighted_sum(p, i):
    return float(np.sum(np.sin(p["w"]) * i["x"]))


def _workspace() -> Workspace:
    return Workspace({"w": np.linspace(-2, 2, 300)}, {"x": np.linspace(0, 1, 300)})


def _batch() -> list[Perturbation]:
    out = []
    for k in range(12):
        out.append(Perturbation("w", slice(0, 300), np.full(300, 0.1 * k)))
        out.append(Perturbation("w", np.array([k]), np.array([5.0])))
    return out


def test_a_pool_gives_the_in_process_losses_in_order():
    ws = _workspace()
    pool = WorkerPool(weighted_sum, ws, None, 2)
    try:
        got = pool.losses(_batch())
    finally:
        pool.close()
    here = LossFunction(weighted_sum, _workspace(), None)
    assert got == [here.at(p) for p in _batch()]


def test_closing_a_pool_stops_every_worker():
    pool = WorkerPool(weighted_sum, _workspace(), None, 2)
    processes = list(pool.processes)
    pool.losses(_batch()[:4])
    pool.close()
    assert not any(p.is_alive() for p in processes)


def test_a_forward_that_cannot_be_pickled_is_one_sentence():
    def local(p, i):
        return 0.0

    local.__qualname__ = "nowhere.to.be.found"  # pickling by reference fails
    with pytest.raises(UsageProblem) as info:
        WorkerPool(local, _workspace(), None, 2)
    assert str(info.value).startswith("forward cannot be sent to other processes (it is not picklable: ")


def stops_in_a_worker(p, i):
    import multiprocessing

    if multiprocessing.parent_process() is not None:
        raise KeyboardInterrupt  # as Ctrl-C would, inside a worker's evaluation
    return float(np.sum(p["w"] ** 2))


def test_an_interrupt_in_a_worker_stops_the_check_and_every_worker():
    import multiprocessing

    from gradprobe import probe

    w = np.full(40, 0.5)
    before = w.tobytes()
    with pytest.raises(KeyboardInterrupt):
        probe(stops_in_a_worker, lambda p, i: {"w": 2 * p["w"]}, {"w": w}, jobs=2)
    assert w.tobytes() == before
    assert multiprocessing.active_children() == []
