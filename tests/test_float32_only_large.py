"""A large model whose code casts every array and its loss to float32 (no wider run).

The network is bench/large_models.py's ``Sensors`` (a tanh regression, its gradient the closed
form that tests/test_large_models.py checks against mpmath's differentiation). Its loss rounds
at about 0.4 eps of |f| (3.5e-8 measured against a float64 copy of the same network), and
along a random unit direction of its 1,000-element bias the loss can take steps up to about
sqrt(1000) times a coordinate's before its elements leave their own scale, so that rounding
weighs far less on a direction than on any one coordinate: where only rounding keeps the
directions from the threshold, a coordinate-wise sweep of the tensor resolves less, not more.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))

from large_models import Demand, Sensors  # noqa: E402

from gradprobe import probe  # noqa: E402

SHAPE = (20, 1000, 4)  # 25,004 coordinates: sampled, with directions, at default options


def _float64_copy(net: Sensors) -> tuple[dict, dict]:
    return ({layer: {k: v.astype(np.float64) for k, v in t.items()} for layer, t in net.params.items()},
            {k: v.astype(np.float64) for k, v in net.inputs.items()})


def test_the_float32_loss_rounds_as_the_module_says():
    # The figures the docstring rests on, measured against the same network in float64.
    net = Sensors(SHAPE, seed=0, cast=True)
    rng = np.random.default_rng(1)
    bias = net.params["hidden"]["b"]
    seen = []
    for _ in range(40):
        p = {layer: dict(t) for layer, t in net.params.items()}
        p["hidden"] = dict(p["hidden"], b=(bias + 1e-3 * rng.normal(size=bias.shape)).astype(np.float32))
        p64, i64 = _float64_copy(net)
        p64["hidden"]["b"] = p["hidden"]["b"].astype(np.float64)
        seen.append(float(net.forward(p, net.inputs)) - Demand.forward(net, p64, i64))
    f = float(net.forward(net.params, net.inputs))
    assert np.std(seen) < np.finfo(np.float32).eps * abs(f)


def test_rounding_limited_directions_of_a_small_tensor_send_no_coordinate_sweep():
    net = Sensors(SHAPE, seed=0, cast=True)
    report = probe(net.forward, net.backward, net.params, net.inputs, seed=0)
    # The closed form is right: nothing fails.
    assert all(t.status != "fail" for t in report.tensors), [(t.name, t.status) for t in report.tensors]
    bias = report.tensor("hidden.b")
    assert bias.checked < bias.shape[0] // 10, bias.checked  # sampled, not swept
    # Fewer calls than the target has coordinates (a plain central sweep takes two each); a
    # sweep of the bias alone took 59,676 (65,605 in all).
    assert report.evaluations < sum(int(np.prod(t.shape)) for t in report.tensors), report.evaluations
    # The directions of hidden.W cannot show one element 1% off at its typical gradient (the
    # closed form's rms): a note, or the tensor's reason where it is undecided, says the
    # smallest error of one element they could have shown.
    rms = float(np.sqrt(np.mean(net.exact(net.params, net.inputs)["hidden"]["W"].astype(np.float64) ** 2)))
    said = [n.split("only above about ")[1] for n in report.notes
            if n.startswith("hidden.W") and "one element's error only above" in n]
    reason = report.tensor("hidden.W").inconclusive_reason or ""
    said += [reason.split("one element's error below about ")[1]] if "one element's error below about " in reason else []
    assert said, (report.notes, reason)
    figure = float(said[0].split(" ")[0])
    assert figure > 0.01 * rms
    for t in report.tensors:
        if t.status == "inconclusive":  # what rounding kept from view is said, with its size
            reason = t.inconclusive_reason or ""
            assert any(s in reason for s in ("relative error below", "could not be resolved", "smallest")), reason
