"""What hints are drawn from: each tensor's measured values, and facts about the target."""

from __future__ import annotations

from dataclasses import field

import numpy as np

from ..common.classes import dataclass

EXPLAINED = 0.05  # a model must leave at most 5% of the discrepancy unexplained


@dataclass(frozen=True)
class Evidence:
    """What a tensor's check measured: checked flat indices, analytic and numeric values."""

    name: str
    shape: tuple[int, ...]
    flat: np.ndarray
    analytic: np.ndarray
    numeric: np.ndarray
    failed: np.ndarray  # bool per checked coordinate

    @property
    def complete(self) -> bool:
        return self.flat.size == int(np.prod(self.shape, dtype=np.int64))

    @property
    def fails(self) -> bool:
        return bool(np.any(self.failed))

    def failed_mask(self) -> np.ndarray:
        """Failing coordinates in the tensor's shape (unchecked ones count as not failing)."""
        mask = np.zeros(self.shape, dtype=bool)
        mask.reshape(-1)[self.flat] = self.failed
        return mask

    def full(self, values: np.ndarray) -> np.ndarray:
        out = np.full(self.shape, np.nan)
        out.reshape(-1)[self.flat] = values
        return out


@dataclass(frozen=True)
class Context:
    """Facts about the target that name causes.

    ``batch_sizes``: the inputs' leading dimensions; ``index_inputs``: integer inputs;
    ``inputs``: floating-point inputs, in the user's own dtype (a rule that computes with them
    takes :func:`as_float64` first); ``param_names``: every param, in the order given.
    """

    batch_sizes: tuple[int, ...] = ()
    index_inputs: dict[str, np.ndarray] = field(default_factory=dict)
    inputs: dict[str, np.ndarray] = field(default_factory=dict)
    param_names: tuple[str, ...] = ()


def as_float64(a: np.ndarray) -> np.ndarray:
    """A user's array as the float64 every hint computes in (numpy.linalg has no float16, and
    ml_dtypes' bfloat16 none either); no copy when it already is float64."""
    return np.asarray(a, dtype=np.float64)


def norm(v: np.ndarray) -> float:
    return float(np.linalg.norm(v))


def explains(model: np.ndarray, e: Evidence) -> bool:
    """``model`` (a prediction of the analytic values) leaves <= 5% of the discrepancy, over
    the tensor and on every failing element: a model that fits on average can leave single
    elements unexplained (an unrelated small gradient is "0 x numeric" on average)."""
    gap = norm(e.analytic - e.numeric)
    return gap > 0 and norm(e.analytic - model) <= EXPLAINED * gap and fits_each(model, e)


def fits_each(model: np.ndarray, e: Evidence) -> bool:
    """Every failing element's residual under ``model`` is <= 5% of its own discrepancy."""
    failing = e.failed
    residual = np.abs(e.analytic - model)[failing]
    return bool(np.all(residual <= EXPLAINED * np.abs(e.analytic - e.numeric)[failing]))


def averaged_fit(model: np.ndarray, e: Evidence) -> bool:
    """``model`` leaves <= 5% of the discrepancy over the whole tensor (for rules that use a
    fit to rule a cause out, where the looser test is the cautious one)."""
    gap = norm(e.analytic - e.numeric)
    return gap > 0 and norm(e.analytic - model) <= EXPLAINED * gap


def count(n: int, word: str, words: str | None = None) -> str:
    """``1 coordinate``, ``3 coordinates``."""
    return f"{n} {word if n == 1 else (words or word + 's')}"

