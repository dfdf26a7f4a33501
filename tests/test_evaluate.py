"""The evaluation path: perturbations as slices or index arrays, applied and undone."""

from __future__ import annotations

import pickle

import numpy as np

from gradprobe.engine.evaluate import LossFunction, Perturbation
from gradprobe.engine.evaluator import Evaluator
from gradprobe.common.tensors import Workspace


def _loss(values: np.ndarray) -> LossFunction:
    weights = np.arange(1.0, values.size + 1).reshape(values.shape)
    return LossFunction(lambda p, i: float(np.sum(weights * p["w"])), Workspace({"w": values}, {}), None)


def test_a_long_contiguous_index_becomes_a_slice():
    p = Perturbation("w", np.arange(10, 110), np.zeros(100))
    assert p.index == slice(10, 110) and p.size == 100


def test_a_slice_pickles_in_a_few_bytes():
    """Whole-tensor perturbations send the changed values, not a 64-bit index per element."""
    values = np.zeros(100_000)
    as_slice = len(pickle.dumps(Perturbation("w", slice(0, 100_000), values)))
    assert as_slice < values.nbytes + 1_000


def test_scattered_and_short_indices_stay_arrays():
    assert isinstance(Perturbation("w", np.array([0, 2, 4] * 30), np.zeros(90)).index, np.ndarray)
    assert isinstance(Perturbation("w", np.arange(5), np.zeros(5)).index, np.ndarray)


def test_slice_and_index_array_give_the_same_loss_and_restore_the_values():
    start = np.linspace(-1.0, 1.0, 200).reshape(10, 20)
    loss = _loss(start.copy())
    new = np.linspace(3.0, 4.0, 150)
    by_slice = loss.at(Perturbation("w", slice(25, 175), new))
    backwards = Perturbation("w", np.arange(174, 24, -1), new[::-1].copy())  # not a run
    assert isinstance(backwards.index, np.ndarray)
    assert loss.at(backwards) == by_slice
    assert loss.workspace.owners["w"].tobytes() == start.tobytes()


def test_a_fortran_ordered_tensor_is_perturbed_in_flat_order():
    start = np.asfortranarray(np.arange(6.0).reshape(2, 3))
    loss = _loss(start)
    moved = loss.at(Perturbation("w", slice(0, 6), np.zeros(6)))
    assert moved == 0.0 and loss.workspace.owners["w"].tobytes() == np.array(start).tobytes()


def test_describe_names_one_coordinate_or_a_count():
    assert Perturbation("w", slice(4, 5), np.zeros(1)).describe((2, 3)) == "w[1, 1]"
    assert Perturbation("w", np.array([4]), np.zeros(1)).describe((2, 3)) == "w[1, 1]"
    assert Perturbation("w", slice(0, 6), np.zeros(6)).describe((2, 3)) == "6 coordinates of w"


def test_the_evaluator_counts_every_forward_call():
    ev = Evaluator(_loss(np.ones(100)))
    ev.base()
    ev.losses([Perturbation("w", slice(0, 100), np.zeros(100))] * 3)
    assert ev.count == 4
