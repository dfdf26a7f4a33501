"""Like with like: a correct target compared with its own baseline under ten other seeds is
never flagged, though the seed moves the sampled coordinates, the random directions and
grad_output.

The targets' gradients are closed forms: d tanh z / dz = 1 / cosh(z)**2 (Abramowitz & Stegun
4.5.82, from memory, as in test_numerics_reference.py) and d|v|/dv = sign(v) away from 0 (at
0 any value in [-1, 1] is a one-sided-consistent subgradient: a kink, common practice).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

import gradprobe
from gradprobe.report.baseline_model import Change


class SensorLayer:
    """A large sampled target (24,000 + 2,000 + 150 elements, past the full-sweep size):
    tanh(readings @ W + b), an array output, plus sum |v| on a vector with exact zeros."""

    def setup(self):
        rng = np.random.default_rng(11)
        v = rng.normal(size=2000)
        v[::9] = 0.0  # kinks of |v|
        params = {"mix": {"W": rng.normal(size=(160, 150)) / 12, "b": rng.normal(size=150) / 4},
                  "gate": {"v": v}}
        return params, {"readings": rng.normal(size=(4, 160))}

    def forward(self, params, inputs):
        z = inputs["readings"] @ params["mix"]["W"] + params["mix"]["b"]
        return np.tanh(z) + 0.01 * np.sum(np.abs(params["gate"]["v"]))

    def backward(self, params, inputs, grad_output):
        z = inputs["readings"] @ params["mix"]["W"] + params["mix"]["b"]
        d = grad_output / np.cosh(z) ** 2  # A&S 4.5.82
        return {"mix": {"W": inputs["readings"].T @ d, "b": d.sum(axis=0)},
                "gate": {"v": 0.01 * np.sum(grad_output) * np.sign(params["gate"]["v"])},
                "readings": d @ params["mix"]["W"].T}


class SmallLayer(SensorLayer):
    """A small target swept in full, whose loss still moves with the seed (grad_output)."""

    def setup(self):
        rng = np.random.default_rng(5)
        return ({"mix": {"W": rng.normal(size=(6, 5)) / 3, "b": rng.normal(size=5)},
                 "gate": {"v": np.array([0.5, -1.5, 2.0])}}, {"readings": rng.normal(size=(3, 6))})


class SensorLoss(SensorLayer):
    """The large target with a scalar loss, 0.5 * sum(tanh(z)**2): the seed moves only the
    sampled coordinates and the directions, not the function."""

    def forward(self, params, inputs):
        return 0.5 * np.sum(super().forward(params, inputs) ** 2)

    def backward(self, params, inputs):
        return super().backward(params, inputs, super().forward(params, inputs))


@pytest.mark.parametrize("case, seeds", [(SensorLayer, 10), (SmallLayer, 10), (SensorLoss, 3)])
def test_ten_other_seeds_flag_nothing(case, seeds, tmp_path):
    base = gradprobe.probe_target(case(), seed=0)
    assert base.ok
    path = tmp_path / "base.json"
    path.write_text(json.dumps(gradprobe.report_dict(base)))
    listed = {t["name"]: t for layer in json.loads(path.read_text())["layers"] for t in layer["tensors"]}
    sampled = [n for n, t in listed.items() if t["checked"] < t["size"]]
    assert (sampled != []) == (case is not SmallLayer)
    growths, shifts = [], []
    for seed in range(1, seeds + 1):
        report = gradprobe.probe_target(case(), seed=seed, baseline=str(path))
        changes = {t.name: t.baseline.change for t in report.tensors}
        assert report.ok, (seed, changes, gradprobe.render_text(report))
        assert not {Change.REGRESSED, Change.WORSE} & set(changes.values())
        if case is SensorLayer:
            assert any("numeric derivatives moved" in note for note in report.notes)
        for t in report.tensors:
            growths.append(t.baseline.growth or 0.0)
            shifts.append(t.baseline.numeric_shift)
            if t.name in sampled:  # compared on the baseline's own coordinates, checked again
                assert t.baseline.compared_on == listed[t.name]["checked"]
                assert t.checked >= listed[t.name]["checked"]
    assert max(growths) < 10  # the default factor, with room
    if case is SensorLoss:  # the same function: the numbers on the baseline's coordinates are its own
        assert set(growths) == {1.0} and set(shifts) == {0.0}
    if case is SensorLayer:  # another seed, another grad_output: the numeric derivatives move
        assert min(shifts) > 0.01


def test_the_baseline_coordinates_are_checked_again_under_another_seed(tmp_path):
    """A sampled tensor's coordinates from the baseline are among those checked now."""
    base = gradprobe.probe_target(SensorLayer(), seed=0)
    path = tmp_path / "base.json"
    path.write_text(json.dumps(gradprobe.report_dict(base)))
    then = set(np.asarray(base.tensor("mix.W").coordinates.flat).tolist())
    now = gradprobe.probe_target(SensorLayer(), seed=3, baseline=str(path)).tensor("mix.W")
    assert then <= set(np.asarray(now.coordinates.flat).tolist())
    alone = gradprobe.probe_target(SensorLayer(), seed=3).tensor("mix.W")
    assert not then <= set(np.asarray(alone.coordinates.flat).tolist())  # the seed does move them
