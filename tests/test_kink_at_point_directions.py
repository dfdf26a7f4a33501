"""A kink exactly at the point hides every random direction: each one crosses it at every
step, however small. A tensor that is sampled (large, or ``--sample``) must not then pass on
its sampled coordinates alone: one element wrong outside them is found by splitting the kinked
directions until their parts are smooth, and a tensor with kinks too dense to split is not
called verified beyond what was checked.

References: d|w|/dw = sign(w) away from 0 and d max(u, 0)/du = [u > 0] away from 0 (the
standard table of derivatives; the value at 0 is a subgradient, common practice); the power
rule d(w**2)/dw = 2 w.
"""

from __future__ import annotations

import numpy as np
import pytest

import gradprobe

# Demo data: crop yields by field and season (invented).
RNG = np.random.default_rng(11)
N_FIELDS, N_INPUTS, N_CROPS = 30, 160, 130  # a 20,800-element weight tensor: sampled
FIELDS = RNG.normal(size=(N_FIELDS, N_INPUTS))
YIELDS = RNG.normal(size=(N_FIELDS, N_CROPS))
PENALTY = 0.05


def _pruned_weights(zero_share: float) -> np.ndarray:
    w = np.random.default_rng(5).normal(size=(N_INPUTS, N_CROPS)) * 0.1
    if zero_share > 0:
        w[np.random.default_rng(6).random(w.shape) < zero_share] = 0.0
    return w


def _sparse_model(wrong_at: int | None, factor: float):
    def forward(params, inputs):
        r = FIELDS @ params["w"] - YIELDS
        return 0.5 * float(np.sum(r * r)) / N_FIELDS + PENALTY * float(np.sum(np.abs(params["w"])))

    def backward(params, inputs):
        w = params["w"]
        g = FIELDS.T @ (FIELDS @ w - YIELDS) / N_FIELDS + PENALTY * np.sign(w)  # d|w|/dw = sign(w)
        if wrong_at is not None:
            g.flat[wrong_at] *= factor
        return {"w": g}

    return forward, backward


def _nonzero_element(w: np.ndarray, k: int) -> int:
    return int(np.flatnonzero(w)[k])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_one_pruned_weight_does_not_hide_a_wrong_element(seed):
    w = _pruned_weights(0.0)
    w.flat[4321] = 0.0  # one weight pruned: |w| has its kink exactly at the point there
    bad = _nonzero_element(w, 15000)
    forward, backward = _sparse_model(bad, 1.01)
    report = gradprobe.probe(forward, backward, {"w": w}, {}, seed=seed)
    t = report.tensor("w")
    assert t.status == "fail", gradprobe.render_text(report)
    assert list(np.unravel_index(bad, w.shape)) in [list(i) for i in t.bad_indices]


@pytest.mark.parametrize("seed", [0, 1])
def test_one_pruned_weight_correct_model_is_verified(seed):
    w = _pruned_weights(0.0)
    w.flat[4321] = 0.0
    forward, backward = _sparse_model(None, 1.0)
    report = gradprobe.probe(forward, backward, {"w": w}, {}, seed=seed)
    assert report.tensor("w").status in ("pass", "kink"), gradprobe.render_text(report)


@pytest.mark.parametrize("seed", [0, 2])
def test_a_few_pruned_weights_do_not_hide_a_wrong_element(seed):
    """At seed 2 the first split misses one of the four (its weight in the split direction
    hides its kink): the directions drawn without the three found are kinked again and split."""
    w = _pruned_weights(0.0)
    w.flat[[17, 5000, 9999, 18000]] = 0.0
    bad = _nonzero_element(w, 700)
    forward, backward = _sparse_model(bad, 1.01)
    report = gradprobe.probe(forward, backward, {"w": w}, {}, seed=seed)
    assert report.tensor("w").status == "fail", gradprobe.render_text(report)
    forward, backward = _sparse_model(None, 1.0)
    report = gradprobe.probe(forward, backward, {"w": w}, {}, seed=seed)
    assert report.tensor("w").status in ("pass", "kink"), gradprobe.render_text(report)


def test_half_the_weights_pruned_is_not_called_verified():
    """Kinks at half the elements: no part of a direction is smooth; the tensor beyond its
    sampled coordinates is not resolved, and a wrong element there must not pass unsaid."""
    w = _pruned_weights(0.5)
    bad = _nonzero_element(w, 6000)
    forward, backward = _sparse_model(bad, 1.01)
    report = gradprobe.probe(forward, backward, {"w": w}, {})
    t = report.tensor("w")
    assert t.status in ("fail", "inconclusive"), gradprobe.render_text(report)
    if t.status == "inconclusive":
        assert "kink" in (t.inconclusive_reason or ""), t.inconclusive_reason


# A small ReLU layer (shop demand by store, invented) with one residual exactly at its kink.
U_SCALE = np.array([[1.3, -0.8, -0.9], [-0.1, -0.6, -0.9], [0.7, 1.2, -0.5]])


def _relu_layer(factor: float):
    weights = np.array([[0.4, 1.1, 0.7], [0.9, 0.3, 1.5], [1.2, 0.6, 0.8]])
    centre = np.array([[0.2, 0.5, 0.1], [0.3, 0.2, 0.4], [0.6, 0.1, 0.3]])

    def forward(params, inputs):
        u = U_SCALE * (params["p"] - centre)
        return float(np.sum(weights * np.maximum(u, 0.0)))

    def backward(params, inputs):
        u = U_SCALE * (params["p"] - centre)
        g = weights * (u > 0) * U_SCALE  # d max(u, 0)/du = [u > 0]
        g[2, 1] *= factor
        return {"p": g}

    p = centre + np.array([[0.5, -0.3, -0.2], [-0.4, -0.1, -0.6], [0.0, 0.35, -0.15]])
    return forward, backward, p  # p[2, 0] sits exactly on its kink (u = 0)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_sampled_small_tensor_with_a_kink_at_the_point(seed):
    forward, backward, p = _relu_layer(1.01)
    report = gradprobe.probe(forward, backward, {"p": p}, {}, sample=3, seed=seed)
    t = report.tensor("p")
    assert t.status == "fail", gradprobe.render_text(report)
    assert [2, 1] in [list(i) for i in t.bad_indices]


def test_sampled_small_tensor_with_a_kink_at_the_point_correct():
    forward, backward, p = _relu_layer(1.0)
    report = gradprobe.probe(forward, backward, {"p": p}, {}, sample=3)
    assert report.tensor("p").status in ("pass", "kink"), gradprobe.render_text(report)


def test_directions_drawn_again_leave_out_the_same_elements_as_arrays():
    """A direction over more than LAZY_DIRECTION elements is drawn again where read: the
    elements left out, and a part scaled to unit length, read the same as the array's."""
    from gradprobe.engine.drawn import LAZY_DIRECTION, Direction, dot, unit_direction, unit_part, without

    size = LAZY_DIRECTION + 5000
    lazy = unit_direction(size, np.random.default_rng(3))
    assert isinstance(lazy, Direction)
    whole = np.asarray(lazy)
    holes = np.array([0, 7, 70000, size - 1])
    left = without(lazy, holes)
    assert isinstance(left, Direction)
    expected = whole.copy()
    expected[holes] = 0.0
    expected /= np.linalg.norm(expected)
    np.testing.assert_allclose(np.asarray(left), expected, rtol=1e-12, atol=0)
    part = unit_part(left, 60000, 200000)
    np.testing.assert_allclose(np.asarray(part), expected[60000:200000] / np.linalg.norm(expected[60000:200000]),
                               rtol=1e-12, atol=0)
    a = np.random.default_rng(4).normal(size=size)
    assert dot(a, left) == pytest.approx(float(a @ expected), rel=1e-12)
    small = without(whole[:100] / np.linalg.norm(whole[:100]), np.array([3]))
    assert small[3] == 0.0 and np.linalg.norm(small) == pytest.approx(1.0)
