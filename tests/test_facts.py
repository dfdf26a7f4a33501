"""Facts of the trade (common practice): the check agrees with them and catches their violation."""

from __future__ import annotations

import numpy as np

from gradprobe import probe

RNG = np.random.default_rng(5)


def test_relu_slope_is_one_above_zero_and_zero_below():
    """ReLU's slope is 1 above 0 and 0 below (common practice)."""
    w = np.array([-2.0, -0.5, 0.3, 1.7])
    report = probe(lambda p, i: float(np.sum(np.maximum(p["w"], 0))),
                   lambda p, i: {"w": (p["w"] > 0).astype(float)}, {"w": w})
    assert report.ok and report.tensor("w").status == "pass"
    wrong = probe(lambda p, i: float(np.sum(np.maximum(p["w"], 0))),
                  lambda p, i: {"w": np.ones(4)}, {"w": w})
    assert wrong.tensor("w").bad_indices == ((0,), (1,))


def test_absolute_error_slope_is_plus_or_minus_one():
    """|r| has slope sign(r) = +-1 away from 0 (common practice)."""
    y = np.array([0.4, -1.2, 2.0])
    w = np.array([1.0, 0.5, -3.0])
    report = probe(lambda p, i: float(np.sum(np.abs(p["w"] - i["y"]))),
                   lambda p, i: {"w": np.sign(p["w"] - i["y"])}, {"w": w}, {"y": y})
    assert report.ok and report.tensor("w").max_rel_error < 1e-9


def test_gradients_of_a_value_used_twice_add():
    """A value used twice gets the sum of both paths' gradients (common practice)."""
    w = RNG.normal(size=5)

    def forward(p, i):
        return float(np.sum(np.sin(p["w"]) + p["w"] ** 2))

    added = probe(forward, lambda p, i: {"w": np.cos(p["w"]) + 2 * p["w"]}, {"w": w})
    assert added.ok
    one_path = probe(forward, lambda p, i: {"w": np.cos(p["w"])}, {"w": w})
    assert not one_path.ok and one_path.tensor("w").failed == 5


def test_chain_rule_multiplies():
    """d/dw f(g(w)) = f'(g(w)) g'(w) (common practice)."""
    w = RNG.normal(size=(3, 2))

    def forward(p, i):
        return float(np.sum(np.tanh(p["w"] ** 3)))

    chain = probe(forward, lambda p, i: {"w": (1 - np.tanh(p["w"] ** 3) ** 2) * 3 * p["w"] ** 2}, {"w": w})
    assert chain.ok and chain.tensor("w").max_rel_error < 1e-8
    outer_only = probe(forward, lambda p, i: {"w": 1 - np.tanh(p["w"] ** 3) ** 2}, {"w": w})
    assert not outer_only.ok
