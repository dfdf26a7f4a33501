"""Per-coordinate verdicts from analytic and numeric values (pure numpy).

The relative error of a coordinate is

    rel = |a - n| / max(|a|, |n|, floor)

with ``floor = 1e-3 * rms(max(|a|, |n|))`` over the tensor's checked coordinates: a
coordinate whose gradient is a thousandth of the tensor's typical size is compared in
absolute terms at that scale, so rounding noise on a zero gradient is not a 100% error.
"""

from __future__ import annotations

import numpy as np

PASS, KINK, INCONCLUSIVE, FAIL = 0, 1, 2, 3
STATUS_NAMES = {PASS: "pass", KINK: "kink", INCONCLUSIVE: "inconclusive", FAIL: "fail"}
FLOOR_FRACTION = 1e-3
NOISE_MARGIN = 3.0  # a discrepancy within 3 noise estimates is not evidence of a bug


def floor_scale(analytic: np.ndarray, numeric: np.ndarray) -> float:
    """The absolute floor of the denominator for one tensor (``tiny`` when all are zero)."""
    size = np.maximum(np.abs(analytic), np.abs(numeric))
    rms = float(np.sqrt(np.mean(size**2))) if size.size else 0.0
    return max(FLOOR_FRACTION * rms, float(np.finfo(np.float64).tiny))


def denominators(analytic: np.ndarray, numeric: np.ndarray, floor: float) -> np.ndarray:
    return np.maximum(np.maximum(np.abs(analytic), np.abs(numeric)), floor)


def relative_errors(analytic: np.ndarray, numeric: np.ndarray, floor: float) -> np.ndarray:
    return np.abs(analytic - numeric) / denominators(analytic, numeric, floor)


def judge(
    analytic: np.ndarray, numeric: np.ndarray, noise: np.ndarray, threshold: float, floor: float
) -> np.ndarray:
    """PASS, INCONCLUSIVE or FAIL per coordinate.

    Inconclusive: the discrepancy exceeds the threshold, but the numeric estimate's own
    error estimate is above the threshold too and explains the discrepancy.
    """
    err = np.abs(analytic - numeric)
    tol = threshold * denominators(analytic, numeric, floor)
    status = np.full(err.shape, FAIL, dtype=np.int8)
    status[err <= tol] = PASS
    noisy = (status == FAIL) & (noise > tol) & (err <= tol + NOISE_MARGIN * noise)
    status[noisy] = INCONCLUSIVE
    return status
