"""Serial calls at moved points share one warnings context until one warns (engine/domain.py).

The reference is the path every other call takes: ``LossFunction.at`` with one
``catch_warnings`` per call. Python's warnings registries hold back a repeated warning from
the same line within one context ("default" action, common practice: the documented
behaviour of the warnings module), so a shared context would hide the second coordinate's
warning if it were not renewed: these tests look for exactly that.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from gradprobe.common.tensors import Workspace
from gradprobe.engine.evaluate import LossFunction, Perturbation


def _rain_gauges(p, i):
    # Log-rainfall of gauges, 0 for a gauge at 0 or below: np.where evaluates the log of every
    # reading, so a move below 0 warns (invalid value) while the loss stays finite.
    x = p["gauge"]
    return float(np.sum(np.where(x > 0, np.log(x), 0.0)))


def _loss(values: np.ndarray) -> LossFunction:
    loss = LossFunction(_rain_gauges, Workspace({"gauge": values.copy()}, {}), None)
    loss.base()  # the base point's warnings (none) are known
    return loss


def _one_by_one(values: np.ndarray, flat: np.ndarray, points: tuple[np.ndarray, ...]) -> np.ndarray:
    loss = _loss(values)
    return np.array([[loss.at(Perturbation("gauge", flat[i:i + 1], v[i:i + 1])) for v in points]
                     for i in range(flat.size)])


def test_each_coordinate_that_warns_is_outside_the_domain_as_with_a_context_per_call():
    values = np.array([0.5, 2.0, 0.25, 3.0, 0.75, 1.5])
    flat = np.arange(values.size)
    # Moves of -1.0: gauges 0, 2 and 4 go below 0 (the same warning, from the same line, three
    # times), the others stay inside; +1.0 never leaves the domain.
    points = (values + 1.0, values - 1.0)
    ticks: list[int] = []
    with warnings.catch_warnings(record=True) as console:
        warnings.simplefilter("default")  # Python's default action: once per line and context
        batched = _loss(values).single_moves("gauge", flat, points, lambda: ticks.append(1))
        reference = _one_by_one(values, flat, points)
    assert console == []  # nothing from a moved point reaches the console
    assert np.isnan(reference[[0, 2, 4], 1]).all() and np.isfinite(reference[[1, 3, 5], 1]).all()
    np.testing.assert_array_equal(np.isnan(batched), np.isnan(reference))
    np.testing.assert_array_equal(batched[np.isfinite(batched)], reference[np.isfinite(reference)])
    assert len(ticks) == 12


def test_a_warning_between_the_calls_is_shown_and_not_taken_for_forwards():
    values = np.array([1.0, 2.0, 3.0])
    flat = np.arange(3)
    points = (values + 0.5,)
    calls = []

    def tick():
        calls.append(1)
        if len(calls) == 1:
            warnings.warn("a note from the progress display", UserWarning, stacklevel=1)

    loss = _loss(values)
    with pytest.warns(UserWarning, match="progress display"):
        got = loss.single_moves("gauge", flat, points, tick)
    assert np.isfinite(got).all()  # no coordinate was taken to lie outside the domain
    np.testing.assert_allclose(got[:, 0], [_rain_gauges({"gauge": np.where(flat == k, values + 0.5, values)}, {})
                                           for k in range(3)])
