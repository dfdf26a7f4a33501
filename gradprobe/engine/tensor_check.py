"""Checking one tensor: which coordinates and directions, localisation, the coordinates, and
the whole tensor along directions where 16-bit rounding leaves its coordinates undecided."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..settings.options import CheckOptions
from .along import along, wanted
from .coordinates import check_coordinates
from .probe import TensorProbe
from .record import TensorRecord
from .sampling import stratified, tensor_rng


def plan(options: CheckOptions, size: int, total: int) -> tuple[int, int]:
    """(coordinates to check, random directions) for a tensor of ``size`` elements in a
    target with ``total`` checkable coordinates.

    A target of at most ``sweep_total`` coordinates is swept in full; in a larger one only
    tensors of at most ``sweep_limit`` elements are, the others are sampled and get
    directional checks.
    """
    full = total <= options.sweep_total or size <= options.sweep_limit
    if options.sample is not None:
        coordinates = options.sample
    elif full:
        coordinates = size
    else:
        coordinates = options.default_sample
    if options.directions is not None:
        directions = options.directions
    elif not full or coordinates < size:  # a tensor sampled, by the plan or the user's --sample
        directions = options.default_directions
    else:
        directions = 0
    return min(coordinates, size), directions


def check_tensor(probe: TensorProbe, options: CheckOptions, total: int, record: TensorRecord) -> None:
    """Check the probed tensor by the plan for its size (``total``: the target's checkable
    coordinates): directions, localisation, coordinates. Annotates ``record``."""
    ev = probe.evaluator
    start = ev.count
    n_coords, n_dirs = plan(options, probe.size, total)
    assert isinstance(probe.a, np.ndarray)  # the numeric side's own gradient (never Widened)
    flat = stratified(record.shape, n_coords, tensor_rng(options.seed, probe.tensor, "sample"), probe.a)
    again = options.also_check.get(probe.tensor)
    if again is not None and tuple(again[0]) == tuple(record.shape):  # an earlier run's coordinates
        flat = np.union1d(flat, np.asarray(again[1], dtype=np.int64))
    if n_dirs:
        from .directional import directional  # local: tensors swept whole need none

        seen = directional(probe, n_dirs, options.seed, stop_early=options.directions is None,
                          sampled=n_coords > 0)
        record.directions = seen.results
        record.located_evaluations = seen.located_evaluations
        flat = np.union1d(flat, seen.candidates)
        if seen.unresolved:
            record.unconfirmed = seen.unresolved
    record.outcome = check_coordinates(probe, flat, options.method, options.recheck)
    if n_dirs and seen.note:  # what the directions could not show, beside the coordinates' note
        said = "; ".join(n for n in (record.outcome.note, seen.note) if n)
        record.outcome = replace(record.outcome, note=said)
    if wanted(probe, record.outcome):  # 16-bit arithmetic left coordinates undecided
        whole = along(probe, record.outcome, options.seed)
        record.directions = record.directions + whole.results
        record.fails_along = whole.fails
    record.evaluations = ev.count - start
