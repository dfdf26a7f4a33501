"""Reading a baseline (``--baseline PATH``): an earlier JSON report, single- or multi-target.

:func:`load_baseline` reads and checks the whole file before any check runs; a missing,
unreadable or malformed one is a :class:`~gradprobe.common.errors.UsageProblem` (exit 2) in one
sentence. :func:`run_against` runs a check with the baseline's coordinates added and compares
the report with it (:func:`gradprobe.report.comparison.compare`).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from ..common.classes import dataclass
from .baseline_model import BaselineReport, BaselineTensor
from ..common.errors import UsageProblem
from ..settings.options import CheckOptions
from .model import CheckedCoordinates, Report
from ..common.status import Status

REPORT_SCHEMA = "gradprobe.report/1"  # as render/json.py writes them
RUNS_SCHEMA = "gradprobe.runs/1"
STATUSES = {s.value for s in Status}
FIX = "give a report written earlier by gradprobe check --json"


class _Malformed(Exception):
    """Where a baseline file departs from the report format (becomes a UsageProblem)."""


def _need(ok: bool, where: str, what: str) -> None:
    if not ok:
        raise _Malformed(f"{where} {what}")


def _number(value: Any, where: str, key: str, optional: bool = True) -> float | None:
    if value is None and optional:
        return None
    _need(isinstance(value, (int, float)) and not isinstance(value, bool), where,
          f"has no valid {key!r}")
    return float(value)


def _coordinates(raw: Any, shape: tuple[int, ...], where: str) -> CheckedCoordinates | None:
    if raw is None:
        return None
    _need(isinstance(raw, dict), where, "has a 'checked_coordinates' that is not an object")
    keys = ("indices", "rel_error", "noise", "status")
    _need(all(isinstance(raw.get(k), list) for k in keys) and len({len(raw[k]) for k in keys}) == 1,
          where, "has 'checked_coordinates' lists of different lengths or missing")
    indices = raw["indices"]
    _need(all(isinstance(i, list) and len(i) == len(shape) and all(
        isinstance(n, int) and 0 <= n < m for n, m in zip(i, shape)) for i in indices), where,
          "has checked coordinates outside its shape")
    _need(all(s in STATUSES for s in raw["status"]), where, "has an unknown coordinate status")
    flat = (np.ravel_multi_index(tuple(np.array(indices, dtype=np.int64).T), shape) if shape
            else np.zeros(len(indices), dtype=np.int64)).astype(np.int64)
    optional = {k: raw.get(k, [None] * len(indices)) for k in ("numeric", "scale")}
    _need(all(isinstance(v, list) and len(v) == len(indices) for v in optional.values()), where,
          "has 'checked_coordinates' lists of different lengths")
    floats = [np.array([np.nan if v is None else _number(v, where, k) for v in values], dtype=float)
              for k, values in (("rel_error", raw["rel_error"]), ("noise", raw["noise"]), *optional.items())]
    ranks = np.array([Status(s).code for s in raw["status"]], dtype=np.int8)
    return CheckedCoordinates(flat, floats[0], floats[1], ranks, floats[2], floats[3])


def _direction(d: Any, where: str) -> tuple[float, float]:
    _need(isinstance(d, dict), where, "has a direction that is not an object")
    rel = _number(d.get("rel_error"), where, "rel_error")
    estimate = _number(d.get("error_estimate"), where, "error_estimate")
    scale = max(abs(_number(d.get("analytic"), where, "analytic") or 0.0),
                abs(_number(d.get("numeric"), where, "numeric") or 0.0), 1e-300)
    return (math.inf if rel is None else rel, math.inf if estimate is None else estimate / scale)


def _tensor(raw: Any, where: str) -> BaselineTensor:
    _need(isinstance(raw, dict), where, "is not an object")
    name = raw.get("name")
    _need(isinstance(name, str), where, "has no 'name'")
    _need(raw.get("status") in STATUSES, where, f"({name}) has no valid 'status'")
    shape = raw.get("shape")
    _need(isinstance(shape, list) and all(isinstance(n, int) and n >= 0 for n in shape), where,
          f"({name}) has no valid 'shape'")
    checked = raw.get("checked", 0)
    _need(isinstance(checked, int), where, f"({name}) has no valid 'checked'")
    directions = raw.get("directions") or []
    _need(isinstance(directions, list), where, f"({name}) has no valid 'directions'")
    return BaselineTensor(
        name=name, shape=tuple(shape), status=Status(raw["status"]),
        max_rel_error=_number(raw.get("max_rel_error"), where, "max_rel_error"),
        worst_noise=_number(raw.get("worst_noise"), where, "worst_noise"), checked=checked,
        coordinates=_coordinates(raw.get("checked_coordinates"), tuple(shape), f"{where} ({name})"),
        directions=tuple(_direction(d, f"{where} ({name})") for d in directions))


def _report(raw: Any, path: str, where: str, prefix: str) -> BaselineReport:
    _need(isinstance(raw, dict), where, "is not an object")
    _need(raw.get("schema") == REPORT_SCHEMA, where,
          f"has schema {raw.get('schema')!r}, not {REPORT_SCHEMA!r} or {RUNS_SCHEMA!r}")
    _need(isinstance(raw.get("target"), str), where, "has no 'target'")
    seed = raw.get("seed")
    _need(isinstance(seed, int) and not isinstance(seed, bool), where, "has no valid 'seed'")
    layers = raw.get("layers")
    _need(isinstance(layers, list) and all(isinstance(x, dict) and isinstance(x.get("tensors"), list)
                                           for x in layers), where, "has no valid 'layers'")
    tensors = tuple(_tensor(t, f"{prefix}layers[{i}].tensors[{j}]")
                    for i, layer in enumerate(layers) for j, t in enumerate(layer["tensors"]))
    return BaselineReport(
        path=path, target=raw["target"], threshold=_number(raw.get("threshold"), where, "threshold",
                                                            optional=False) or 0.0,
        seed=seed, method=str(raw.get("method", "central")),
        compute_dtype=str(raw.get("compute_dtype", "float64")), tensors=tensors,
        numbers_dtype="float64" if raw.get("narrow_threshold") is not None
        else str(raw.get("compute_dtype", "float64")), sampling=_sampling(raw.get("sampling"), where))


def _sampling(raw: Any, where: str) -> tuple[int | None, int | None] | None:
    """The run's ``sampling`` object as (sample, directions); None where the report has none."""
    if raw is None:
        return None
    _need(isinstance(raw, dict), where, "has a 'sampling' that is not an object")
    values = tuple(raw.get(k) for k in ("sample", "directions"))
    _need(all(v is None or (isinstance(v, int) and not isinstance(v, bool) and v >= 0) for v in values),
          where, "has no valid 'sampling'")
    return values[0], values[1]


@dataclass(frozen=True)
class Baseline:
    """Every report of a baseline file, by target."""

    path: str
    reports: tuple[BaselineReport, ...]

    def report_for(self, target: str, alone: bool) -> BaselineReport | None:
        """The report of ``target``; when the run and the file each hold one target, that
        report whatever its name (the comparison says so in a note)."""
        match = next((r for r in self.reports if r.target == target), None)
        if match is None and alone and len(self.reports) == 1:
            return self.reports[0]
        return match

    def others(self, targets: list[str]) -> list[str]:
        """The baseline's targets this run does not check (none when one is paired with one)."""
        if len(targets) == 1 and len(self.reports) == 1:
            return []
        return [r.target for r in self.reports if r.target not in targets]


def load_baseline(path: str | os.PathLike[str]) -> Baseline:
    """Read and check the baseline at ``path``; a UsageProblem in one sentence when it cannot
    be used."""
    name = os.fspath(path)
    try:
        with open(name, encoding="utf-8") as handle:
            text = handle.read()
    except OSError as exc:
        raise UsageProblem(f"cannot read the baseline {name} ({exc.strerror or exc}); {FIX}",
                           value=name) from exc
    except UnicodeDecodeError as exc:
        raise UsageProblem(f"the baseline {name} is not text, so not a JSON report; {FIX}",
                           value=name) from exc
    try:
        raw = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageProblem(f"the baseline {name} is not JSON ({exc.msg} at line {exc.lineno}); {FIX}",
                           value=name) from exc
    try:
        if isinstance(raw, dict) and raw.get("schema") == RUNS_SCHEMA:
            runs = raw.get("reports")
            if not isinstance(runs, list):
                raise _Malformed("it has no 'reports' list")
            reports = tuple(_report(r, name, f"reports[{k}]", f"reports[{k}].")
                            for k, r in enumerate(runs))
        else:
            reports = (_report(raw, name, "it", ""),)
    except _Malformed as exc:
        raise UsageProblem(f"the baseline {name} is not a gradprobe JSON report: {str(exc).strip()}; {FIX}",
                           value=name) from None
    return Baseline(name, reports)


def baseline_of(options: CheckOptions) -> Baseline | None:
    """The baseline ``options`` name, read and checked (None when none is named)."""
    return load_baseline(options.baseline) if options.baseline is not None else None


def coordinates_of(base: BaselineReport) -> Mapping[str, tuple[tuple[int, ...], tuple[int, ...]]]:
    """The coordinates the baseline lists, per tensor, for the engine to check again."""
    return {t.name: (t.shape, tuple(int(k) for k in t.coordinates.flat))
            for t in base.tensors if t.coordinates is not None and t.coordinates.flat.size}


def run_against(baseline: Baseline | None, target: str, options: CheckOptions,
                run: Callable[[CheckOptions], Report], alone: bool = True,
                others: list[str] | None = None) -> Report:
    """``run(options)``, compared with ``baseline``'s report of ``target`` when there is a
    baseline (its coordinates are checked again, so the comparison is on the same ones).
    ``others``: the baseline's targets the run does not check, said in a note."""
    if baseline is None:
        return run(options)
    base = baseline.report_for(target, alone)
    if base is not None:
        options = replace(options, also_check=coordinates_of(base))
    from .comparison import compare  # local: a run without a baseline starts lean

    report = compare(run(options), base, float(options.baseline_growth), baseline.path, options.selects)
    if others:
        note = f"the baseline {baseline.path} also holds {', '.join(others)}, not checked in this run"
        report = replace(report, notes=report.notes + (note,))
    return report
