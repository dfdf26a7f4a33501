"""Stateful layers in the object style, checked through the adapter."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import SAMPLES

from gradprobe import layer_target, probe_target
from gradprobe.common.errors import TargetLoadError


class Dense:
    def __init__(self, bug=False):
        rng = np.random.default_rng(4)
        self.W = rng.normal(size=(3, 2))
        self.b = rng.normal(size=2)
        self.bug = bug

    def forward(self, x):
        self.x = x
        return np.tanh(x @ self.W + self.b)

    def backward(self, grad_y):
        out = np.tanh(self.x @ self.W + self.b)
        dz = grad_y * (1 - out**2)
        self.dW = self.x.T @ dz
        self.db = dz.sum(axis=0) * (2.0 if self.bug else 1.0)
        return dz @ self.W.T


X = np.random.default_rng(5).normal(size=(6, 3))


def test_a_correct_layer_passes_and_the_layer_is_left_as_it_was():
    layer = Dense()
    W, b = layer.W, layer.b
    before = (W.tobytes(), b.tobytes())
    report = probe_target(layer_target(layer, X, {"W": "dW", "b": "db"}))
    assert report.ok
    assert {t.name for t in report.tensors} == {"Dense.W", "Dense.b", "x"}
    assert layer.W is W and layer.b is b and (W.tobytes(), b.tobytes()) == before


def test_a_wrong_stored_gradient_is_named():
    report = probe_target(layer_target(Dense(bug=True), X, {"W": "dW", "b": "db"}))
    assert [t.name for t in report.failing_tensors] == ["Dense.b"]
    assert "2 x numeric" in report.tensor("Dense.b").hint


def test_a_gradient_attribute_that_is_never_stored_is_one_sentence():
    with pytest.raises(TargetLoadError) as info:
        probe_target(layer_target(Dense(), X, {"W": "dW", "b": "dbias"}))
    assert str(info.value) == "Dense layer: backward stored no gradient in layer.dbias for b."


def test_a_missing_parameter_attribute_is_refused():
    with pytest.raises(TargetLoadError) as info:
        layer_target(Dense(), X, {"V": "dV"})
    assert str(info.value) == "the layer Dense has no attribute 'V'."


def test_the_sample_runs(run_cli):
    result = run_cli("check", f"{SAMPLES / 'stateful_layer.py'}:case")
    assert result.exit_code == 0 and "PriceResponse.W" in result.output
