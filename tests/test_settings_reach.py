"""Settings reach every stage of a check: here --no-recheck in float32 code's own check.

float32 code that also runs in float64 is judged on that run; where its float32 gradient
leaves the float64 one, the coordinate is checked again on the float32 code itself. The
target: loss sum(w**2), d/dw = 2w (table of derivatives, common practice); its backward is
right in float64 and 1.5 times too large in float32 only.
"""

from __future__ import annotations

import numpy as np
import pytest

from gradprobe import probe
from gradprobe.engine import coordinates

W = np.array([0.3, -1.2, 0.8], dtype=np.float32)  # soil-moisture weights of a yield model


def _forward(p, i):
    return np.sum(p["w"] ** 2)


def _backward(p, i):
    g = 2 * p["w"]
    return {"w": g if g.dtype == np.float64 else g * np.float32(1.5)}


@pytest.mark.parametrize("recheck", [True, False])
def test_recheck_reaches_the_float32_codes_own_check(monkeypatch, recheck):
    seen = []
    central = coordinates._central

    def spy(probe_, flat, again):
        seen.append((str(probe_.compute_dtype), again))
        return central(probe_, flat, again)

    monkeypatch.setattr(coordinates, "_central", spy)
    report = probe(_forward, _backward, {"w": W}, recheck=recheck)
    assert report.tensor("w").status == "fail" and report.compute_dtype == "float32"
    assert ("float32", recheck) in seen  # the float32 code's own check ran, with the setting
    assert {again for _, again in seen} == {recheck}
