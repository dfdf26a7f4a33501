"""A run over several targets for the HTML report's tests: two failing tensors in two targets
(one of them three-dimensional), and a target that passes."""

from __future__ import annotations

from conftest import SAMPLES

# A field of soil-moisture sensors (3 plots x 4 rows x 5 probes) whose calibration gains K
# enter the loss as 0.5 * sum((K * x)**2). Backward forgets x**2 in plot 1 for probe 2:
# the wrong slice is [1, :, 2].
SOIL_FIELD = """
import numpy as np

def setup():
    rng = np.random.default_rng(4)
    return {"field": {"K": rng.uniform(0.5, 1.5, (3, 4, 5))}}, {"x": rng.uniform(1.0, 2.0, (3, 4, 5))}

def forward(params, inputs):
    return float(0.5 * np.sum((params["field"]["K"] * inputs["x"]) ** 2))

def backward(params, inputs):
    g = params["field"]["K"] * inputs["x"] ** 2
    g[1, :, 2] = params["field"]["K"][1, :, 2]
    return {"field": {"K": g}}
"""

FAILING = {"field.K", "out.W"}


def targets(write_target) -> list[str]:
    """The run's targets, the three-dimensional failure first."""
    soil = write_target(SOIL_FIELD, "soil_field.py")
    return [str(soil), str(SAMPLES / "crop_yield_buggy.py"), str(SAMPLES / "crop_yield.py")]
