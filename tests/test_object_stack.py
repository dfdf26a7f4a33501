"""Class-style layers through the adapters; the user's objects are left exactly as they were."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from gradprobe import probe_stack
from gradprobe.targets.adapters import layer_target
from gradprobe.engine.runner import run_check
from gradprobe.common.errors import UserCodeError
from gradprobe.targets.object_stack import object_stack


class Dense:
    """Attribute-style params, a call counter and a cache."""

    def __init__(self, n, m, seed, slip=None):
        rng = np.random.default_rng(seed)
        self.W, self.b = rng.normal(size=(n, m)), rng.normal(size=m)
        self.calls, self.slip = 0, slip

    def forward(self, x):
        self.calls += 1
        self.x = x
        return x @ self.W + self.b

    def backward(self, d):
        if self.slip == "raise":
            raise RuntimeError("cache lost")
        if self.slip == "interrupt":
            raise KeyboardInterrupt
        self.dW = self.x.T @ d * (-1.0 if self.slip == "param" else 1.0)
        self.db = d.sum(axis=0)
        return d @ self.W.T * (3.0 if self.slip == "input" else 1.0)


class BatchNorm:
    """Dict-held params and grads, running statistics updated in place."""

    def __init__(self, n):
        self.params = {"gamma": np.linspace(0.5, 1.5, n), "beta": np.zeros(n)}
        self.grads = {}
        self.running_mean, self.running_var = np.zeros(n), np.ones(n)

    def forward(self, x):
        mu, var = x.mean(axis=0), x.var(axis=0)
        self.running_mean *= 0.9
        self.running_mean += 0.1 * mu
        self.running_var = 0.9 * self.running_var + 0.1 * var
        self.std = np.sqrt(var + 1e-5)
        self.xhat = (x - mu) / self.std
        return self.params["gamma"] * self.xhat + self.params["beta"]

    def backward(self, d):
        self.grads["gamma"] = (d * self.xhat).sum(axis=0)
        self.grads["beta"] = d.sum(axis=0)
        dxhat = d * self.params["gamma"]
        return (dxhat - dxhat.mean(axis=0) - self.xhat * (dxhat * self.xhat).mean(axis=0)) / self.std


class Rectify:
    def forward(self, x):
        self.mask = x > 0
        return x * self.mask

    def backward(self, d):
        return d * self.mask


class ChoiceLoss:
    def forward(self, scores, labels):
        z = np.exp(scores - scores.max(axis=1, keepdims=True))
        self.p, self.labels = z / z.sum(axis=1, keepdims=True), labels
        return -float(np.mean(np.log(self.p[np.arange(len(labels)), labels])))

    def backward(self):
        d = self.p.copy()
        d[np.arange(len(self.labels)), self.labels] -= 1.0
        return d / len(self.labels)


RNG = np.random.default_rng(8)
X, LABELS = RNG.normal(size=(8, 4)), RNG.integers(0, 3, size=8)


def _network(slip=None):
    return [Dense(4, 5, 1), BatchNorm(5), Rectify(), Dense(5, 3, 2, slip=slip)], ChoiceLoss()


def _state(objects):
    """Every attribute's identity and bytes, to compare before and after."""
    return pickle.dumps([vars(o) for o in objects]), [{k: id(v) for k, v in vars(o).items()} for o in objects]


def test_a_correct_object_stack_passes_and_is_left_as_it_was():
    layers, loss = _network()
    layers[0].forward(X)  # an earlier call of the user's: caches and a counter already set
    before = _state([*layers, loss])
    report = probe_stack(object_stack(layers, loss, X, LABELS))
    assert report.ok and report.error_enters_at == ()
    assert [layer.name for layer in report.layers] == [
        "Dense1", "BatchNorm", "Rectify", "Dense2", "ChoiceLoss", "inputs"]
    assert {t.name for t in report.tensors} >= {"Dense1.W", "BatchNorm.gamma", "Dense2.b", "x"}
    assert _state([*layers, loss]) == before
    assert layers[0].calls == 1 and not hasattr(layers[3], "dW")
    assert [n for n in report.notes if "taken as state" in n] == [
        "layer BatchNorm: running_mean taken as state, not params (no gradient stored for them; "
        "name them with grads= to check them)"]


@pytest.mark.parametrize("slip, wrong_input", [("input", True), ("param", False)])
def test_a_wrong_object_layer_is_named(slip, wrong_input):
    layers, loss = _network(slip)
    report = probe_stack(object_stack(layers, loss, X, LABELS))
    assert report.error_enters_at == ("Dense2",)
    affine2 = next(layer for layer in report.layers if layer.name == "Dense2")
    assert affine2.input_gradient_wrong is wrong_input
    if wrong_input:
        assert {t.inherited_from for t in report.failing_tensors} == {"Dense2"}


@pytest.mark.parametrize("slip, error", [("raise", UserCodeError), ("interrupt", KeyboardInterrupt)])
def test_objects_are_restored_when_user_code_fails_or_is_interrupted(slip, error):
    layers, loss = _network(slip)
    before = _state([*layers, loss])
    with pytest.raises(error):
        st = object_stack(layers, loss, X, LABELS, grads={"Dense2": {"W": "dW", "b": "db"}})
        probe_stack(st)
    assert _state([*layers, loss]) == before


def test_single_layer_adapter_with_dict_params_leaves_running_statistics_alone():
    bn = BatchNorm(5)
    before = _state([bn])
    x = np.random.default_rng(9).normal(size=(8, 5))
    report = run_check(layer_target(bn, x, {"gamma": "grads.gamma", "beta": "grads.beta"}))
    assert report.ok and {t.name for t in report.tensors} == {"BatchNorm.gamma", "BatchNorm.beta", "x"}
    assert _state([bn]) == before and bn.grads == {}


def test_single_layer_adapter_restores_on_interrupt():
    layer = Dense(4, 3, 5, slip="interrupt")
    before = _state([layer])
    with pytest.raises(KeyboardInterrupt):
        run_check(layer_target(layer, X, {"W": "dW", "b": "db"}))
    assert _state([layer]) == before
