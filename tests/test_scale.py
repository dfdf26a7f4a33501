"""Sampling, directional checks, localisation, parallel and cluster evaluation."""

from __future__ import annotations

import json
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from conftest import SAMPLES

from gradprobe import probe, probe_target, render_text
from gradprobe.engine.sampling import stratified, tensor_rng
from gradprobe.render.json import report_dict

N = 100_000
RNG = np.random.default_rng(0)
W = RNG.normal(size=N)
C = RNG.uniform(0.5, 1.5, size=N)


def forward(p, i):
    return float(np.sum(i["c"] * np.sin(p["w"])))


def exact(p, i):
    return i["c"] * np.cos(p["w"])


def _with_errors(factors):
    def backward(p, i):
        g = exact(p, i).copy()
        for k, f in factors.items():
            g[k] *= f
        return {"w": g}

    return backward


def _directional_only(backward):
    return probe(forward, backward, {"w": W}, {"c": C}, sample=0)


def test_one_planted_error_is_located_exactly():
    report = _directional_only(_with_errors({12_345: 1.5}))
    t = report.tensor("w")
    assert t.bad_indices == ((12_345,),) and t.status == "fail"
    assert t.located_evaluations is not None and report.evaluations < 200


def test_three_planted_errors_are_located_exactly():
    report = _directional_only(_with_errors({7: 0.5, 50_000: -1.0, 99_998: 1.2}))
    t = report.tensor("w")
    assert t.bad_indices == ((7,), (50_000,), (99_998,))
    # about k log2(N) group tests: 3 x 17 = 51, a few evaluations each
    assert t.located_evaluations <= 3 * 17 * 8


def test_a_1e4_relative_error_in_one_element_is_detected():
    """Relative error 1e-4 in one of 1e5 elements: below 1e-6 of the directional derivative,
    far above its numeric noise."""
    report = _directional_only(_with_errors({4_242: 1 + 1e-4}))
    t = report.tensor("w")
    assert all(not d.ok for d in t.directions)
    assert t.bad_indices == ((4_242,),)


def test_a_correct_large_tensor_passes_directionally():
    report = _directional_only(lambda p, i: {"w": exact(p, i)})
    t = report.tensor("w")
    assert report.ok and all(d.ok for d in t.directions) and t.checked == 0
    assert report.evaluations <= 60


def test_default_plan_for_a_large_tensor_samples_and_uses_directions():
    report = probe(forward, lambda p, i: {"w": exact(p, i)}, {"w": W}, {"c": C})
    t = report.tensor("w")
    assert report.ok and t.checked == 24 and len(t.directions) == 2
    assert t.evaluations <= 100


def test_sampling_is_reproducible_and_covers_every_row_and_column():
    analytic = np.random.default_rng(3).normal(size=40 * 70)
    first = stratified((40, 70), 90, tensor_rng(5, "W", "sample"), analytic)
    again = stratified((40, 70), 90, tensor_rng(5, "W", "sample"), analytic)
    other = stratified((40, 70), 90, tensor_rng(6, "W", "sample"), analytic)
    assert np.array_equal(first, again) and not np.array_equal(first, other)
    rows, cols = np.unravel_index(first, (40, 70))
    assert first.size == 90 and set(rows) == set(range(40)) and set(cols) == set(range(70))
    top = np.argsort(-np.abs(analytic))[:2]
    assert set(top) <= set(first)  # the largest gradients are in


def test_sampling_covers_every_slice_of_a_3d_tensor():
    flat = stratified((5, 6, 7), 7, tensor_rng(0, "k", "sample"), np.zeros(210))
    index = np.unravel_index(flat, (5, 6, 7))
    assert [len(set(axis)) for axis in index] == [5, 6, 7]


def test_sample_option_limits_checked_coordinates(run_cli):
    result = run_cli("check", str(SAMPLES / "sensor_mixer.py"), "--sample", "5", "--json", "-")
    report = json.loads(result.stdout)
    checked = {t["name"]: t["checked"] for l in report["layers"] for t in l["tensors"]}
    assert checked == {"mix.W": 5, "mix.b": 3, "gain": 3, "raw": 5}


def _comparable(report):
    d = report_dict(report)
    d["summary"].pop("seconds")
    return d


def test_two_jobs_give_the_same_report_as_serial():
    serial = probe_target(str(SAMPLES / "crop_yield_buggy.py"))
    parallel = probe_target(str(SAMPLES / "crop_yield_buggy.py"), jobs=2)
    assert _comparable(parallel) == _comparable(serial)


def test_any_executor_gives_the_same_report():
    def backward(p, i):
        return {"w": exact(p, i)[:50] * np.r_[np.ones(49), 2.0]}

    small = {"w": W[:50]}
    inputs = {"c": C[:50]}
    serial = probe(forward, backward, small, inputs)
    with ThreadPoolExecutor(2) as pool:
        threaded = probe(forward, backward, small, inputs, executor=pool)
    assert _comparable(threaded) == _comparable(serial)
    assert threaded.tensor("w").bad_indices == ((49,),)


def test_dask_local_cluster_gives_the_same_report():
    """A real local Dask cluster with two worker processes, through Client.get_executor().

    Run in a fresh interpreter: a process cluster sharing the test process with everything
    else can deadlock while closing."""
    pytest.importorskip("distributed")
    script = Path(__file__).with_name("dask_case.py")
    proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out["workers"] == 2
    assert out["cluster"] == out["serial"]
    tensor = out["cluster"]["layers"][0]["tensors"][0]
    assert tensor["bad_indices"] == [[3]]


def test_workers_do_not_call_setup_again(tmp_path):
    """setup() runs once per check, also with --jobs 2."""
    counter = tmp_path / "calls.txt"
    target = tmp_path / "counted.py"
    target.write_text(f"""
import numpy as np

def setup():
    with open({str(counter)!r}, "a") as f:
        f.write("x")
    return {{"w": np.linspace(-1, 1, 6)}}, {{}}

def forward(p, i):
    return float(np.sum(np.exp(p["w"])))

def backward(p, i):
    return {{"w": np.exp(p["w"])}}
""")
    report = probe_target(str(target), jobs=2)
    assert report.ok and counter.read_text() == "x"


def _relu_network(seed):
    rng = np.random.default_rng(seed)
    d, h, n = 300, 400, 64
    params = {"l1": {"W": rng.normal(scale=1 / np.sqrt(d), size=(d, h)), "b": rng.normal(scale=0.1, size=h)},
              "l2": {"W": rng.normal(scale=1 / np.sqrt(h), size=(h, 10))}}
    inputs = {"x": rng.normal(size=(n, d)), "y": rng.normal(size=(n, 10))}

    def fwd(p, i):
        z = i["x"] @ p["l1"]["W"] + p["l1"]["b"]
        return 0.5 * np.sum((np.maximum(z, 0) @ p["l2"]["W"] - i["y"]) ** 2) / n

    def bwd(p, i):
        z = i["x"] @ p["l1"]["W"] + p["l1"]["b"]
        a = np.maximum(z, 0)
        r = (a @ p["l2"]["W"] - i["y"]) / n
        dz = (r @ p["l2"]["W"].T) * (z > 0)
        return {"l1": {"W": i["x"].T @ dz, "b": dz.sum(0)}, "l2": {"W": a.T @ r}}

    return fwd, bwd, params, inputs


@pytest.mark.parametrize("seed", [1, 2])
def test_directions_through_relu_kinks_pass_a_correct_network_with_nothing_inconclusive(seed):
    """Tens of thousands of ReLU units along every random direction: the directional steps
    stay below the distance to the nearest kink, and the sides are extrapolated apart."""
    fwd, bwd, params, inputs = _relu_network(seed)
    report = probe(fwd, bwd, params, inputs, sample=0, seed=seed)
    assert report.ok, render_text(report)
    assert report.count("inconclusive") == 0
    assert all(d.ok for t in report.tensors for d in t.directions)


@pytest.mark.parametrize("factor", [1.01, 0.0])
def test_one_wrong_element_of_a_relu_weight_is_found_and_located(factor):
    """One element of l1.W (120,000 elements) 1% off or zeroed, checked by directions alone."""
    fwd, bwd, params, inputs = _relu_network(3)
    grads = bwd(params, inputs)
    target = np.unravel_index(int(np.argmax(np.abs(grads["l1"]["W"]))), grads["l1"]["W"].shape)

    def wrong(p, i):
        g = bwd(p, i)
        g["l1"]["W"][target] *= factor
        return g

    report = probe(fwd, wrong, params, inputs, sample=0, seed=3)
    t = report.tensor("l1.W")
    assert t.status == "fail" and t.bad_indices == (tuple(int(i) for i in target),), render_text(report)
    assert report.tensor("l2.W").status == "pass"


def test_an_unpicklable_forward_with_jobs_is_one_sentence():
    from gradprobe.common.errors import UsageProblem

    def local_forward(p, i):
        return float(np.sum(p["w"] ** 2))

    with pytest.raises(UsageProblem, match="not picklable"):
        probe(local_forward, lambda p, i: {"w": 2 * p["w"]}, {"w": np.ones(4)},
              jobs=2)


def test_a_forward_raising_in_a_worker_keeps_its_sentence(tmp_path):
    from gradprobe.common.errors import UserCodeError

    target = tmp_path / "fragile.py"
    target.write_text("""
import numpy as np
params = {"w": np.array([1.0, 2.0, 3.0])}
def forward(p, i):
    if p["w"][1] > 2.0:
        raise ValueError("stock below zero")
    return float(np.sum(p["w"] ** 2))
def backward(p, i):
    return {"w": 2 * p["w"]}
""")
    with pytest.raises(UserCodeError, match=r"forward raised ValueError: stock below zero when w\[1\] was perturbed"):
        probe_target(str(target), jobs=2)
