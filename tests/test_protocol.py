"""Details of the target protocol (shared target-protocol.md, sections 2 and 4)."""

from __future__ import annotations

import numpy as np

from gradprobe import probe


def test_a_size_one_array_is_a_scalar_loss():
    """forward may return a Python float, a 0-d array or a size-1 array (then backward has 2 args)."""
    w = np.array([0.3, -1.2])
    for wrap in (float, np.asarray, lambda v: np.array([v]), lambda v: np.array([[v]])):
        report = probe(lambda p, i, wrap=wrap: wrap(np.sum(p["w"] ** 2)), lambda p, i: {"w": 2 * p["w"]}, {"w": w})
        assert report.ok


def test_nested_inputs_are_named_by_their_keys_in_the_inputs_layer():
    x = np.array([[0.5, -0.5], [1.0, 2.0]])

    def forward(p, i):
        return float(np.sum(p["w"] * i["batch"]["x"] ** 2))

    def backward(p, i):
        return {"w": np.sum(i["batch"]["x"] ** 2, axis=0), "batch": {"x": 2 * p["w"] * i["batch"]["x"]}}

    report = probe(forward, backward, {"w": np.array([1.5, -0.5])}, {"batch": {"x": x}})
    t = report.tensor("batch.x")
    assert report.ok and t.layer == "inputs" and t.kind == "input"
    assert [layer.name for layer in report.layers] == ["w", "inputs"]


def test_deeper_nesting_names_the_layer_up_to_the_last_dot():
    params = {"encoder": {"block1": {"W": np.eye(2), "b": np.zeros(2)}}}

    def forward(p, i):
        blk = p["encoder"]["block1"]
        return float(np.sum(np.tanh(blk["W"] @ np.ones(2) + blk["b"])))

    def backward(p, i):
        blk = p["encoder"]["block1"]
        d = 1 - np.tanh(blk["W"] @ np.ones(2) + blk["b"]) ** 2
        return {"encoder": {"block1": {"W": np.outer(d, np.ones(2)), "b": d}}}

    report = probe(forward, backward, params)
    assert report.ok and [layer.name for layer in report.layers] == ["encoder.block1"]
    assert {t.name for t in report.tensors} == {"encoder.block1.W", "encoder.block1.b"}


def test_anything_numpy_asarray_accepts_is_an_array():
    report = probe(lambda p, i: float(np.sum(np.asarray(p["w"]) ** 3)),
                   lambda p, i: {"w": [3 * v**2 for v in p["w"]]}, {"w": [0.5, 1.0, -2.0]})
    assert report.ok and report.tensor("w").shape == (3,)


def test_evaluations_count_every_forward_call():
    calls = []

    def forward(p, i):
        calls.append(1)
        return float(np.sum(np.sin(p["w"])))

    report = probe(forward, lambda p, i: {"w": np.cos(p["w"])}, {"w": np.linspace(0, 1, 5)})
    assert report.evaluations == len(calls)
