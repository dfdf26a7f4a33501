"""Helpers of the framework tests: a framework that is missing skips its tests, except in
CI (``CI`` set), where ``.ci/run`` installs the extras and a missing one fails; and
reference gradients by mpmath on the same function written with mpmath's own arithmetic."""

from __future__ import annotations

import importlib
import os
from collections.abc import Callable
from types import ModuleType

import mpmath
import numpy as np
import pytest


def need(module: str) -> ModuleType:
    """Import ``module`` or skip the test (fail it in CI)."""
    try:
        return importlib.import_module(module)
    except ImportError:
        if os.environ.get("CI"):
            pytest.fail(f"{module} is not installed in CI: .ci/run should install the frameworks extra")
        pytest.skip(f"{module} is not installed (pip install 'gradprobe[frameworks]')")


def mp_gradient(loss: Callable[[list], object], values: np.ndarray) -> np.ndarray:
    """The gradient of ``loss`` (a function of a flat list of mpmath numbers) at ``values``,
    each coordinate by mpmath's numerical differentiation at 30 digits."""
    base = [mpmath.mpf(float(v)) for v in np.asarray(values, dtype=np.float64).reshape(-1)]
    out = np.empty(len(base))
    with mpmath.workdps(30):
        for k in range(len(base)):
            def along(t, k=k):
                moved = list(base)
                moved[k] = t
                return loss(moved)
            out[k] = float(mpmath.diff(along, base[k]))
    return out.reshape(np.shape(values))


def rel_gap(a: np.ndarray, b: np.ndarray) -> float:
    """The largest |a - b| relative to the largest |b| (a whole-tensor relative error)."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


def assert_bfloat16_inside_verdict(report, factor: float) -> None:
    """A rule computing in bfloat16 inside float32 arrays: judged on bfloat16 arithmetic; the
    right rule (factor 1) fails nothing, a wrong one (2x, sign flipped) fails ``w``."""
    assert report.compute_dtype == "bfloat16"
    if factor == 1.0:
        assert report.ok, [(t.name, t.status) for t in report.tensors]
    else:
        assert report.tensor("w").status == "fail"


def check_ending(forward: Callable, params: dict, inputs: dict, ending: str) -> None:
    """Run a check of the autograd-rule target ``forward`` that ends as ``ending`` says: "pass"
    or "fail" (its verdict asserted), "crash" or "interrupt" (raised through to the caller)."""
    from gradprobe.api import probe

    if ending in ("pass", "fail"):
        assert probe(forward, None, params, inputs).ok is (ending == "pass")
    else:
        with pytest.raises(Exception if ending == "crash" else KeyboardInterrupt):
            probe(forward, None, params, inputs)


def swish_function(factor: float = 1.0) -> type:
    """A torch autograd Function: x * sigmoid(x) with a hand-written backward, its gradient
    ``factor`` times the right one (1: right; d/dx x s(x) = s (1 + x (1 - s)), common
    practice)."""
    torch = need("torch")

    class Swish(torch.autograd.Function):
        @staticmethod
        def forward(ctx, z):
            ctx.save_for_backward(z)
            return z * torch.sigmoid(z)

        @staticmethod
        def backward(ctx, g):
            (z,) = ctx.saved_tensors
            s = torch.sigmoid(z)
            grad = g * (s * (1 + z * (1 - s)))
            return grad if factor == 1.0 else grad * factor

    return Swish
