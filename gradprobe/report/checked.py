"""The checked coordinates of a tensor, part of the report model: every run keeps them (the
report model), a baseline lists them (:mod:`gradprobe.report.baseline_model`)."""

from __future__ import annotations

from typing import Any

from ..common.classes import dataclass


@dataclass(frozen=True)
class CheckedCoordinates:
    """Checked coordinates of a tensor: flat index, relative error, its relative noise (the
    numeric estimate's error bound over the coordinate's scale), its status's code
    (:attr:`gradprobe.common.status.Status.code`, 0 pass .. 3 fail), the numeric derivative and
    the scale rel is taken against; arrays of one length (every checked coordinate in a
    run; those a report lists in a baseline)."""

    flat: Any
    rel: Any
    noise: Any
    rank: Any  # status codes
    numeric: Any
    scale: Any  # the denominator of rel
