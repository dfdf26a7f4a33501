"""Array-API arrays (array-api-strict) and bfloat16 inside numpy arrays (ml_dtypes).

Right and wrong gradients are established independently by mpmath on the same loss.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from framework_kit import mp_gradient, need, rel_gap

from gradprobe.api import probe
from gradprobe.common.errors import InPlaceWriteError, TargetLoadError
from gradprobe.render.json import report_dict
from gradprobe.targets.loading import load_target

xp = need("array_api_strict")
ml_dtypes = need("ml_dtypes")

RNG = np.random.default_rng(31)
X = RNG.normal(size=(6, 3))
Y = RNG.normal(size=(6,))
W = RNG.normal(size=(3,))


def mp_loss(w: list) -> object:
    """sum_i log(cosh((X w - y)_i)): a robust regression loss of crop yields, with mpmath."""
    return sum(mpmath.log(mpmath.cosh(sum(mpmath.mpf(X[i, k]) * w[k] for k in range(3)) - mpmath.mpf(Y[i])))
               for i in range(6))


REFERENCE = mp_gradient(mp_loss, W)


def forward(p, i):
    r = i["x"] @ p["w"] - i["y"]
    return xp.sum(xp.log(xp.cosh(r)))


def backward_right(p, i):
    r = i["x"] @ p["w"] - i["y"]
    return {"w": xp.matrix_transpose(i["x"]) @ xp.tanh(r)}  # d log cosh = tanh


def backward_wrong(p, i):
    r = i["x"] @ p["w"] - i["y"]
    return {"w": xp.matrix_transpose(i["x"]) @ xp.sinh(r)}  # sinh is d cosh, not d log cosh


def arrays():
    return {"w": xp.asarray(W)}, {"x": xp.asarray(X), "y": xp.asarray(Y)}


@pytest.mark.parametrize("backward, right", [(backward_right, True), (backward_wrong, False)])
def test_array_api_strict_verdicts(backward, right):
    p, i = arrays()
    gap = rel_gap(np.from_dlpack(backward(p, i)["w"]), REFERENCE)  # independent of gradprobe
    assert (gap < 1e-12) if right else (gap > 0.05)
    seen = []

    def fwd(params, inputs):
        seen.append(type(params["w"]))
        return forward(params, inputs)

    report = probe(fwd, backward, p, i)
    assert report.ok is right
    data = report_dict(report)
    assert (data["array_library"], data["gradient_source"]) == ("array_api_strict", "backward")
    assert data["layers"][0]["tensors"][0]["dtype"] == "float64"
    assert set(seen) == {type(p["w"])}
    assert np.array_equal(np.from_dlpack(p["w"]), W)  # the caller's array, bitwise unchanged


def test_a_write_into_an_array_api_array_is_an_error():
    p, i = arrays()

    def fwd(params, inputs):
        inputs["x"][0, 0] = 0.0
        return forward(params, inputs)

    with pytest.raises(InPlaceWriteError):
        probe(fwd, backward_right, p, i)
    assert np.array_equal(np.from_dlpack(i["x"]), X)


def test_an_array_api_target_without_backward_is_told_which_frameworks_can(write_target, run_cli):
    with pytest.raises(TargetLoadError, match="no backward function"):
        probe(forward, None, *arrays())


def test_a_framework_that_is_not_installed_names_the_extra(write_target, monkeypatch):
    path = write_target("import array_api_strict as xp\nparams = {'w': xp.asarray([1.0])}\n"
                        "def forward(p, i):\n    return xp.sum(p['w'])\n")
    monkeypatch.setitem(__import__("sys").modules, "array_api_strict", None)
    with pytest.raises(TargetLoadError, match=r"not installed here: install it with pip install 'gradprobe\[array-api\]'"):
        load_target(str(path))



def test_bfloat16_numpy_arrays_right_and_wrong():
    """ml_dtypes.bfloat16 params with a numpy backward computing in bfloat16."""
    bf16 = np.dtype(ml_dtypes.bfloat16)
    w = W.astype(bf16)

    def fwd(p, i):
        r = i["x"] @ p["w"].astype(i["x"].dtype) - i["y"]
        return np.sum(np.log(np.cosh(r)))

    def make(derivative):
        def bwd(p, i):
            r = i["x"] @ p["w"].astype(i["x"].dtype) - i["y"]
            return {"w": (i["x"].T @ derivative(r)).astype(p["w"].dtype)}
        return bwd

    right = probe(fwd, make(np.tanh), {"w": w}, {"x": X.copy(), "y": Y.copy()})
    wrong = probe(fwd, make(np.sinh), {"w": w}, {"x": X.copy(), "y": Y.copy()})
    assert right.ok and not wrong.ok
    assert right.tensors[0].dtype == "bfloat16"
    assert w.dtype == bf16 and np.array_equal(w.astype(np.float64), W.astype(bf16).astype(np.float64))


def test_bakery_samples(run_cli):
    import json

    from conftest import SAMPLES

    right = run_cli("check", str(SAMPLES / "bakery_orders_array_api.py"), "--json", "-")
    wrong = run_cli("check", str(SAMPLES / "bakery_orders_array_api_buggy.py"), "--json", "-")
    assert (right.exit_code, wrong.exit_code) == (0, 1)
    assert json.loads(right.stdout)["array_library"] == "array_api_strict"


def test_arrays_on_another_device_stay_there():
    """array-api-strict's simulated second device: the code gets its arrays there, the JSON
    names the device. d sin = cos (any table of derivatives)."""
    device = xp.Device("device1")
    seen = []

    def fwd(p, i):
        seen.append(p["w"].device)
        return xp.sum(xp.sin(p["w"]))

    report = probe(fwd, lambda p, i: {"w": xp.cos(p["w"])}, {"w": xp.asarray(W, device=device)})
    assert report.ok and set(seen) == {device}
    tensor = report_dict(report)["layers"][0]["tensors"][0]
    assert "device1" in tensor["device"]
