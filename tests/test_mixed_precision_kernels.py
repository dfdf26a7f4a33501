"""A kernel written the mixed-precision way: float16 or bfloat16 arrays in and out, float32
arithmetic inside (``.astype(np.float32)`` / ``.float()``), the result cast back. Given float64
arrays, such code still computes in float32 inside, so its "float64 run" is no float64
reference: it was taken for one where the look for a narrower type inside saw nothing, and a
correct rule failed at 1e-6 on float32's rounding.

- An RMS norm is scale-invariant: the look's even move (every param times 1 + 2**-30) leaves
  its loss unchanged in float64 too, so it is repeated along a move of random signs.
- A softmax's bias starting at 0 cannot be moved in proportion to its size, so the floating
  inputs (the logits) are moved as well.

The float32 run is then the reference; right rules pass and wrong ones fail.

References: d/dz_j of sum_k c_k g_k z_k / rms(z) is g_j c_j / rms - z_j sum_k(c_k g_k z_k) /
(n rms**3) for rms = sqrt(mean(z**2) + eps) (quotient and chain rules), and
d/dz_j [logsumexp(z) - z_y] = softmax(z)_j - [j = y] (common practice); both checked against
mpmath below.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

import gradprobe

EPS = 1e-6
RNG = np.random.default_rng(0)
# Demo data: meter readings (invented).
Z = RNG.normal(size=(4, 5)) * 1000
GAIN = 1 + 0.1 * RNG.normal(size=5)
C = RNG.normal(size=(4, 5))
LOGITS = RNG.normal(size=(3, 6)) * 1e-3  # shop-demand scores per category
LABELS = np.array([2, 0, 5])


def _rms_target(dtype, drop_term=False):
    def forward(params, inputs):
        z = params["z"]
        zf = z.astype(np.float32)
        r = 1 / np.sqrt((zf * zf).mean(-1, keepdims=True) + np.float32(EPS))
        out = (zf * r * inputs["gain"].astype(np.float32)).astype(z.dtype)
        return (out.astype(np.float32) * inputs["c"].astype(np.float32)).sum().astype(z.dtype)

    def backward(params, inputs):
        z = params["z"]
        zf, gf, c = (a.astype(np.float32) for a in (z, inputs["gain"], inputs["c"]))
        r = 1 / np.sqrt((zf * zf).mean(-1, keepdims=True) + np.float32(EPS))
        a = c * gf
        dz = r * a if drop_term else r * a - zf * r ** 3 * (a * zf).sum(-1, keepdims=True) / z.shape[-1]
        return {"z": dz.astype(z.dtype)}

    params = {"z": Z.astype(dtype)}
    inputs = {"gain": GAIN.astype(dtype), "c": C.astype(dtype)}
    return forward, backward, params, inputs


def _softmax_target(dtype, sign=1.0):
    def forward(params, inputs):
        zf = (inputs["x"] + params["bias"]).astype(np.float32)
        m = zf.max(-1, keepdims=True)
        lse = np.log(np.exp(zf - m).sum(-1)) + m[:, 0]
        return (lse - zf[np.arange(3), LABELS]).mean().astype(inputs["x"].dtype)

    def backward(params, inputs):
        zf = (inputs["x"] + params["bias"]).astype(np.float32)
        p = np.exp(zf - zf.max(-1, keepdims=True))
        p /= p.sum(-1, keepdims=True)
        p[np.arange(3), LABELS] -= 1
        d = (sign * p / 3).astype(inputs["x"].dtype)
        return {"bias": d.sum(0).astype(inputs["x"].dtype), "x": d}

    return forward, backward, {"bias": np.zeros(6, dtype)}, {"x": LOGITS.astype(dtype)}


def test_the_rules_are_right_by_mpmath():
    mpmath.mp.dps = 30
    z, g, c = Z.astype(np.float16).astype(float), GAIN.astype(np.float16).astype(float), C.astype(np.float16).astype(float)
    _, backward, params, inputs = _rms_target(np.float64)
    got = backward({"z": z}, {"gain": g, "c": c})["z"]

    def loss_row(row, j, v):
        vals = [mpmath.mpf(z[row, k]) if k != j else v for k in range(5)]
        rms = mpmath.sqrt(sum(x * x for x in vals) / 5 + mpmath.mpf(EPS))
        return sum(mpmath.mpf(c[row, k]) * mpmath.mpf(g[k]) * vals[k] / rms for k in range(5))

    for row, j in ((0, 0), (2, 3), (3, 4)):
        ref = float(mpmath.diff(lambda v: loss_row(row, j, v), mpmath.mpf(z[row, j])))
        assert got[row, j] == pytest.approx(ref, rel=1e-5)
    x = LOGITS
    _, backward, params, inputs = _softmax_target(np.float64)
    got = backward({"bias": np.zeros(6)}, {"x": x})["x"]

    def loss_x(i, j, v):
        row = [mpmath.mpf(x[i, k]) if k != j else v for k in range(6)]
        return (mpmath.log(sum(mpmath.exp(t) for t in row)) - row[LABELS[i]]) / 3

    for i, j in ((0, 2), (1, 4), (2, 5)):
        ref = float(mpmath.diff(lambda v: loss_x(i, j, v), mpmath.mpf(x[i, j])))
        assert got[i, j] == pytest.approx(ref, rel=1e-5, abs=1e-9)


@pytest.mark.parametrize("dtype", [np.float16, "bfloat16"])
def test_a_mixed_precision_norm_passes_and_its_dropped_term_fails(dtype):
    dtype = np.dtype(pytest.importorskip("ml_dtypes").bfloat16) if dtype == "bfloat16" else np.dtype(dtype)
    report = gradprobe.probe(*_rms_target(dtype))
    assert report.ok, gradprobe.render_text(report)
    report = gradprobe.probe(*_rms_target(dtype, drop_term=True))
    assert report.tensor("z").status == "fail", gradprobe.render_text(report)


@pytest.mark.parametrize("dtype", [np.float16, "bfloat16"])
def test_a_mixed_precision_softmax_with_a_zero_bias_passes_and_its_sign_fails(dtype):
    dtype = np.dtype(pytest.importorskip("ml_dtypes").bfloat16) if dtype == "bfloat16" else np.dtype(dtype)
    report = gradprobe.probe(*_softmax_target(dtype))
    assert report.ok, gradprobe.render_text(report)
    report = gradprobe.probe(*_softmax_target(dtype, sign=-1.0))
    assert not report.ok, gradprobe.render_text(report)
