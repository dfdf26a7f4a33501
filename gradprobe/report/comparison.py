"""Comparing a report with an earlier one (protocol section 8): pure, part of the report model.

:func:`compare` annotates each tensor of a :class:`~gradprobe.report.model.Report` with what the
earlier run (the baseline, read by :mod:`gradprobe.report.baseline_file`) said about it and how it
changed; renderers only show the result.

Like with like: where the baseline lists every coordinate it checked (a sampled tensor, or
any tensor of at most 256 coordinates), the worst errors and statuses are taken over the
coordinates both runs checked (the run checks the baseline's listed coordinates again, see
``CheckOptions.also_check``), so a sample or a seed of its own does not make a tensor look
changed.

The noise floor: a growth counts only above it. When this run's numeric derivatives are
bitwise the baseline's at the coordinates the baseline lists (same forward, point, steps and
loss: only backward changed), the numeric side of both errors is the same number and the
floor is the compute type's central-difference resolution eps ** (2/3) (3.7e-11 in float64):
errors below it are rounding (1e-15 -> 1e-13 is not a regression). When they moved (forward,
seed with an array output, or method changed), each error is known only to within its numeric
error bound, so the floor is also the larger of the two runs' ``± noise`` at their worst
coordinates.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace

import numpy as np

from ..common.classes import dataclass
from .baseline_model import BaselineReport, BaselineTensor, Change, RunBaseline, TensorBaseline
from .model import CheckedCoordinates, Report, TensorResult
from ..common.status import Status, worst
from ..common.wording import plural


def resolution(dtype: str) -> float:
    """The best relative accuracy of a central difference in ``dtype``: eps ** (2/3)."""
    try:
        eps = float(np.finfo(np.dtype(dtype)).eps)
    except TypeError:
        eps = float(np.finfo(np.float64).eps)
    return eps ** (2.0 / 3.0)


@dataclass(frozen=True)
class _Side:
    """One run's view of a tensor on the coordinates compared."""

    status: Status
    worst: float | None
    noise: float | None


def _on(coords: CheckedCoordinates, keep: np.ndarray) -> _Side:
    statuses = [Status.of_code(r) for r in coords.rank[keep]]
    judged = keep & (coords.rank != Status.KINK.code) & np.isfinite(coords.rel)
    if not judged.any():
        return _Side(worst(statuses), None, None)
    k = int(np.argmax(np.where(judged, coords.rel, -np.inf)))
    noise = float(coords.noise[k]) if np.isfinite(coords.noise[k]) else None
    return _Side(worst(statuses), float(coords.rel[k]), noise)


def _sides(now: TensorResult, then: BaselineTensor, same_seed: bool) -> tuple[_Side, _Side, int | None]:
    """This run's and the baseline's view, on the coordinates both checked when the baseline
    lists every one it checked (and the sets differ), else on the whole tensors; and how
    many coordinates both checked (None: not known)."""
    whole = (_Side(now.status, now.max_rel_error, now.worst_noise),
             _Side(then.status, then.max_rel_error, then.worst_noise))
    mine, theirs = now.coordinates, then.coordinates
    if mine is None or theirs is None or tuple(now.shape) != tuple(then.shape):
        return (*whole, None)
    shared = np.intersect1d(mine.flat, theirs.flat)
    complete = len(theirs.flat) == then.checked
    if shared.size == 0 or not complete:
        return (*whole, None)
    if same_seed and shared.size == len(mine.flat) == len(theirs.flat):
        return (*whole, int(shared.size))  # the very same coordinates and directions
    return (_on(mine, np.isin(mine.flat, shared)), _on(theirs, np.isin(theirs.flat, shared)),
            int(shared.size))


@dataclass(frozen=True)
class _Growth:
    """A measured growth: this run's worst error over the baseline's, above ``floor``."""

    growth: float
    floor: float
    now: float
    then: float
    shift: float | None = None  # how far the numeric derivatives moved on shared coordinates


def _shared_growth(mine: CheckedCoordinates, theirs: CheckedCoordinates, res: float) -> _Growth | None:
    """On the coordinates both list and judged (not at a kink): the numeric side of both
    errors is known there, so the floor is how far the numeric derivatives moved (0 when
    forward, point, steps and loss are the same) or the resolution ``res``, the larger."""
    _, i, j = np.intersect1d(mine.flat, theirs.flat, return_indices=True)
    kink = Status.KINK.code
    keep = ((mine.rank[i] != kink) & (theirs.rank[j] != kink) & np.isfinite(mine.rel[i])
            & np.isfinite(theirs.rel[j]) & np.isfinite(theirs.numeric[j]) & np.isfinite(theirs.scale[j]))
    if not keep.any():
        return None
    i, j = i[keep], j[keep]
    scale = np.maximum(np.maximum(mine.scale[i], theirs.scale[j]), 1e-300)
    shift = float(np.max(np.abs(mine.numeric[i] - theirs.numeric[j]) / scale))
    now, then = float(mine.rel[i].max()), float(theirs.rel[j].max())
    floor = max(res, shift)
    return _Growth(now / max(then, floor), floor, now, then, shift)


def _bounded_growth(mine: _Side, theirs: _Side, res: float) -> _Growth | None:
    """Worst against worst where the numbers cannot be matched: each error is known only to
    within its numeric error bound, so the floor is also the larger of the two bounds."""
    if mine.worst is None or theirs.worst is None:
        return None
    floor = max([res, *(n for n in (mine.noise, theirs.noise) if n is not None)])
    return _Growth(mine.worst / max(theirs.worst, floor), floor, mine.worst, theirs.worst)


def _measure(now: TensorResult, then: BaselineTensor, mine: _Side, theirs: _Side, same_seed: bool,
             res: float) -> _Growth | None:
    """The growth that decides: on the shared listed coordinates, and worst against worst
    (bounded) where there are none, the baseline does not list every coordinate it checked
    or the numeric derivatives moved; the larger."""
    listed = then.coordinates
    shared = None
    if now.coordinates is not None and listed is not None and tuple(now.shape) == tuple(then.shape):
        shared = _shared_growth(now.coordinates, listed, res)
    found = [shared]
    partial = listed is None or len(listed.flat) < then.checked
    if shared is None or (shared.shift or 0.0) > res or partial:
        found.append(_bounded_growth(mine, theirs, res))
    if mine.worst is None and theirs.worst is None and same_seed:
        sides = _directions(now, then)
        if sides is not None:
            found.append(_bounded_growth(*sides, res))
    known = [g for g in found if g is not None]
    if not known:
        return None
    decides = max(known, key=lambda g: g.growth)
    return replace(decides, shift=shared.shift if shared is not None else None)


def _directions(now: TensorResult, then: BaselineTensor) -> tuple[_Side, _Side] | None:
    """Tensors checked by random directions only (same seed, same directions)."""
    if not now.directions or len(now.directions) != len(then.directions):
        return None
    rel = [d.rel_error for d in now.directions]
    k = int(np.argmax(rel))
    d = now.directions[k]
    noise_now = d.error_estimate / max(abs(d.analytic), abs(d.numeric), 1e-300)
    j = int(np.argmax([r for r, _ in then.directions]))
    return (_Side(now.status, rel[k], noise_now),
            _Side(then.status, then.directions[j][0], then.directions[j][1]))


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.1e}"


def compare_tensor(now: TensorResult, then: BaselineTensor, factor: float, same_seed: bool,
                   floor_base: float) -> TensorBaseline:
    """How one tensor changed since the baseline (``floor_base``: the rounding floor)."""
    mine, theirs, shared = _sides(now, then, same_seed)
    measured = _measure(now, then, mine, theirs, same_seed, floor_base)
    growth = measured.growth if measured is not None else None
    floor = measured.floor if measured is not None else None
    record = TensorBaseline(Change.SAME, then.status, then.max_rel_error, growth, floor, shared,
                            measured.shift if measured is not None else None)
    newly_failing = now.status is Status.FAIL and then.status is not Status.FAIL
    if newly_failing or mine.status > theirs.status:
        was, became = theirs.status, now.status if newly_failing else mine.status
        where = f" on the {plural(shared, 'coordinate')} both runs checked" if shared and not newly_failing else ""
        return replace(record, change=Change.WORSE,
                       reason=f"{now.name}: worse than the baseline: {was} -> {became}{where}")
    both_pass = {mine.status, theirs.status} <= {Status.PASS, Status.KINK}
    if both_pass and measured is not None and measured.growth > factor:
        return replace(record, change=Change.REGRESSED, reason=(
            f"{now.name}: regressed since the baseline: worst relative error {_fmt(measured.then)} "
            f"-> {_fmt(measured.now)} (x{measured.growth:.3g}, more than x{factor:g} above the "
            f"noise floor {measured.floor:.1e}) while both pass"))
    shrank = (both_pass and measured is not None
              and measured.then / max(measured.now, measured.floor) > factor)
    if mine.status < theirs.status or shrank:
        return replace(record, change=Change.BETTER)
    return record


def _settings_note(report: Report, base: BaselineReport) -> str | None:
    differ = [(what, then, now) for what, then, now in (
        ("target", base.target, report.target), ("seed", base.seed, report.seed),
        ("threshold", f"{base.threshold:g}", f"{report.threshold:g}"),
        ("method", base.method, report.method), ("compute type", base.compute_dtype, report.compute_dtype),
        ("sampling", _sampling(base.sampling), _sampling((report.sample, report.directions))),
    ) if then != now and then is not None]
    if not differ:
        return None
    listed = "; ".join(f"{what} {then} (this run: {now})" for what, then, now in differ)
    return (f"the baseline {base.path} differs from this run in {listed}: tensors are "
            "compared by name, on the coordinates both runs checked where the baseline lists them, "
            "and errors below their noise floor are not compared")


def _sampling(asked: tuple[int | None, int | None] | None) -> str | None:
    """--sample and --directions as a note names them; None where the baseline does not say."""
    if asked is None:
        return None
    return ", ".join(f"{what} {'by default' if value is None else value}"
                     for what, value in zip(("--sample", "--directions"), asked))


def _same_coordinates(now: TensorResult, then: BaselineTensor, record: TensorBaseline) -> bool:
    if then.coordinates is not None:  # sampled: the very coordinates compared, on both sides
        return record.compared_on is not None and record.compared_on == now.checked == then.checked
    return now.checked == then.checked and now.checked in (0, now.size)  # both whole, or none


def _coverage_note(report: Report, base: BaselineReport, records: dict[str, TensorBaseline]) -> str | None:
    moved = [t.name for t in report.tensors if (then := base.tensor(t.name)) is not None
             and not _same_coordinates(t, then, records[t.name])]
    if not moved:
        return None
    return (f"{_list(moved)} {'was' if len(moved) == 1 else 'were'} checked on other coordinates "
            "than in the baseline: compared on the coordinates both runs checked where the baseline "
            "lists them, else worst against worst")


def _moved_past(record: TensorBaseline, floor: float) -> bool:
    """The numeric derivatives moved by more than the baseline's worst error (and the
    resolution ``floor``): the comparison is then blunter than the errors themselves."""
    shift = record.numeric_shift or 0.0
    return shift > max(floor, record.max_rel_error or 0.0)


def _list(names: Sequence[str], shown: int = 8) -> str:
    more = f" and {len(names) - shown} more" if len(names) > shown else ""
    return ", ".join(names[:shown]) + more


def compare(report: Report, base: BaselineReport | None, factor: float, path: str,
            selects: Callable[[str], bool] = lambda name: True) -> Report:
    """``report`` with each tensor's ``baseline`` set and notes on what differs or is gone.

    ``base`` is the baseline's report for this target (None: the baseline holds none, so
    every tensor is new). ``selects``: whether the run chose to check a tensor (``--only``,
    ``--skip``); a baseline tensor it left out is not gone."""
    if base is None:
        tensors = {t.name: TensorBaseline(Change.NEW) for t in report.tensors}
        note = f"the baseline {path} holds no report for {report.target}: every tensor is new"
        return _annotated(report, tensors, RunBaseline(path, None, factor), [note])
    same_seed = base.seed == report.seed
    measured_in = "float64" if report.narrow_threshold is not None else report.compute_dtype
    floor = max(resolution(base.numbers_dtype), resolution(measured_in))
    records = {}
    for t in report.tensors:
        then = base.tensor(t.name)
        records[t.name] = (TensorBaseline(Change.NEW) if then is None else
                           compare_tensor(t, then, factor, same_seed, floor))
    names = {t.name for t in report.tensors}
    gone = tuple(t for t in base.tensors if t.name not in names and selects(t.name))
    notes = [n for n in (_settings_note(report, base), _coverage_note(report, base, records)) if n]
    if gone:
        notes.append(f"gone since the baseline: {_list([f'{t.name} ({t.status})' for t in gone])} "
                     f"{'is' if len(gone) == 1 else 'are'} in {path} but not in this run")
    new = [t.name for t in report.tensors if records[t.name].change is Change.NEW]
    if new:
        notes.append(f"new since the baseline: {_list(new)}")
    compared = (Change.SAME, Change.BETTER, Change.REGRESSED)
    moved = [f"{t.name} ({records[t.name].numeric_shift:.0e})" for t in report.tensors
             if records[t.name].change in compared and _moved_past(records[t.name], floor)]
    if moved:
        notes.append(f"the numeric derivatives moved since the baseline by more than its errors "
                     f"(relative): {_list(moved)}; a change of error below that is not counted "
                     "(forward, the method, or the seed of an array output changed?)")
    unrated = [t.name for t in report.tensors if base.tensor(t.name) is not None and not same_seed
               and t.max_rel_error is None and t.directions]
    if unrated:
        notes.append(f"{_list(unrated)}: checked by random directions only, which move with the seed "
                     "(other than the baseline's), so their errors were not compared")
    return _annotated(report, records, RunBaseline(path, base.target, factor, gone), notes)


def _annotated(report: Report, records: dict[str, TensorBaseline], run: RunBaseline,
               notes: list[str]) -> Report:
    layers = tuple(replace(layer, tensors=tuple(replace(t, baseline=records[t.name]) for t in layer.tensors))
                   for layer in report.layers)
    return replace(report, layers=layers, baseline=run, notes=report.notes + tuple(notes))
