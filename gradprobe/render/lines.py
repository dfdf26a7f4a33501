"""The one-line texts about a report: header, verdict and the failure line, fitted to a width.

Lines are built from parts joined by `` · ``; when a width is given, a line breaks only
between parts (or drops its optional tail), so numbers and names are never split.
"""

from __future__ import annotations

from ..report.model import LayerResult, Report, TensorResult
from ..common.status import Status
from ..common.tensors import format_index
from ..common.wording import plural, verb

SEP = " · "
AGREES, DISAGREES = "agrees", "DISAGREES"  # the verdict line's first word: the run's outcome


def threshold_part(report: Report) -> str:
    """Which threshold judges what, in one part: narrow code checked on its float64 run is
    held to two (its float64 run's and its own gradient's against that run)."""
    dtype = report.compute_dtype
    if report.narrow_threshold is None:
        return f"threshold {report.threshold:g} ({dtype})"
    return (f"threshold {report.threshold:g} ({dtype} code run in float64; "
            f"its {dtype} gradient within {report.narrow_threshold:.2g} of that run)")


def header_parts(report: Report) -> list[str]:
    parts = ["gradprobe", report.target, report.method, threshold_part(report), f"seed {report.seed}"]
    if report.array_library != "numpy" or report.gradient_source != "backward":  # section 6
        parts.append(f"{report.array_library} arrays, {report.gradient_source} gradient")
    return parts


def wrap_parts(parts: list[str], width: int | None, indent: str = "  ") -> str:
    """``parts`` joined by `` · ``, broken between parts so no line passes ``width``."""
    if width is None:
        return SEP.join(parts)
    lines = [parts[0]]
    for part in parts[1:]:
        if len(lines[-1]) + len(SEP) + len(part) <= width:
            lines[-1] += SEP + part
        else:
            lines.append(indent + SEP.lstrip() + part)
    return "\n".join(lines)


def header(report: Report, width: int | None = None) -> str:
    return wrap_parts(header_parts(report), width)


def _names(tensors: tuple[TensorResult, ...], room: int | None) -> str:
    """Tensor names, comma-separated; as many whole names as fit in ``room``, then ``+N more``."""
    names = [t.name for t in tensors]
    shown = names[:5]
    if room is not None:
        while len(shown) > 1 and len(", ".join(shown)) + len(f" +{len(names)} more") > room:
            shown.pop()
    text = ", ".join(shown)
    return text + (f" +{len(names) - len(shown)} more" if len(shown) < len(names) else "")


def verdict(report: Report, width: int | None = None, named: bool = False) -> str:
    """One line: the outcome, what is wrong and, when it fits ``width``, what it cost;
    ``named`` puts the target first (the line alone, as ``--quiet`` prints it)."""
    if named:
        head = f"{report.target}: "
        return head + _verdict(report, None if width is None else max(width - len(head), 20))
    return _verdict(report, width)


def _verdict(report: Report, width: int | None) -> str:
    n = len(report.tensors)
    cost = f"{plural(report.evaluations, 'evaluation')} in {report.seconds:.2f} s"
    changed = report.changed_for_worse
    so = report.second_order
    if not report.ok and not report.blocking_tensors and not changed and so is not None and not so.ok:
        blocks = len(so.failing_blocks)
        what = (f"{blocks} of {len(so.blocks)} Hessian blocks disagree beyond {report.threshold:g}"
                if blocks else "the Hessian is not symmetric" if so.symmetric == "fail"
                else "the Hessian agrees with a wrong gradient")
        line = f"{DISAGREES}{SEP}second derivatives: {what}"
        return line if width is not None and len(line + SEP + cost) > width else line + SEP + cost
    if not report.ok and not report.blocking_tensors and not changed:  # a stack layer wrong on its own only
        line = f"{DISAGREES}{SEP}the own backward of {', '.join(report.error_enters_at or ())} is wrong"
        return line if width is not None and len(line + SEP + cost) > width else line + SEP + cost
    if not report.ok:
        blocking = report.blocking_tensors
        bad = tuple(t for t in report.tensors if t in blocking or t in changed)
        failing = len(report.failing_tensors)
        parts = [f"{failing} of {plural(n, 'tensor')} beyond {report.threshold:g}"] if failing else []
        if len(blocking) > failing:
            parts.append(f"{len(blocking) - failing} of {n} inconclusive (set to fail the run)")
        parts += _baseline_parts(report, n)
        head = DISAGREES + SEP + "; ".join(parts) + ": "
        full = head + _names(bad, None) + SEP + cost
        if width is None or len(full) <= width:
            return full
        return head + _names(bad, width - len(head))
    extras = []
    kinked, unsure = report.count(Status.KINK), report.count(Status.INCONCLUSIVE)
    if kinked:
        extras.append(f"{kinked} at a kink")
    if unsure:
        extras.append(f"{unsure} inconclusive")
    if report.baseline is not None:
        extras.append("none worse than the baseline")
    more = f" ({', '.join(extras)})" if extras else ""
    line = f"{AGREES}{SEP}{plural(n, 'tensor')} within {report.threshold:g}{more}"
    if width is None or len(line + SEP + cost) <= width:
        return line + SEP + cost
    return line


def _baseline_parts(report: Report, n: int) -> list[str]:
    """What got worse since the baseline, for the verdict line."""
    from ..report.baseline_model import Change  # --baseline only: loaded then

    changes = [t.baseline.change for t in report.changed_for_worse if t.baseline is not None]
    regressed, worse = changes.count(Change.REGRESSED), changes.count(Change.WORSE)
    parts = []
    if regressed:
        factor = report.baseline.growth_factor if report.baseline is not None else 0.0
        parts.append(f"{regressed} of {plural(n, 'tensor')} regressed since the baseline "
                     f"(error grew more than x{factor:g})")
    if worse:
        parts.append(f"{worse} of {n} worse than the baseline")
    return parts


def failure_line(report: Report) -> str:
    """The first line of a failure message, short because pytest's summary cuts it at the
    terminal's width: the failing tensors, then the worst relative error, where, and the
    threshold it exceeds (``W disagrees: rel error 2.0e+00 at [0, 0] > 1e-06``)."""
    bad = report.failing_tensors
    if not bad and report.changed_for_worse:
        first = report.changed_for_worse
        reason = first[0].baseline.reason if first[0].baseline is not None else None
        more = f" (and {len(first) - 1} more)" if len(first) > 1 else ""
        return f"{reason}{more}"
    so = report.second_order
    if not bad and so is not None and not so.ok:
        blocks = ", ".join(b.name for b in so.failing_blocks[:3]) or "no block"
        where = "the gradient" if so.error_enters_at == "gradient" else "the Hessian"
        return (f"second derivatives fail ({blocks}; symmetric: {so.symmetric.value}); the "
                f"error enters at {where}")
    if not bad:
        return f"{report.target}: every tensor agrees within {report.threshold:g}"
    names = _names(bad, None)
    rated = [t for t in bad if t.max_rel_error is not None or t.directions]
    if not rated:
        return f"{names} {verb(len(bad), 'fails', 'fail')}: {bad[0].hint or 'its gradient could not be compared'}"
    worst = max(rated, key=_worst_error)
    where = f" in {worst.name}" if len(bad) > 1 else ""
    if worst.max_rel_error is None:
        where += " along a random direction"
    elif worst.worst_index is not None:
        where += f" at {format_index(worst.worst_index)}"
    line = (f"{names} {verb(len(bad), 'disagrees', 'disagree')}: rel error "
            f"{_worst_error(worst):.1e}{where} > {report.threshold:g}")
    d = worst.worst_detail
    if d is not None:
        line += f" (backward gave {d.analytic:.6g}, numeric {d.numeric:.6g})"
    return line


def expected_line(t: TensorResult) -> str | None:
    """Where a failing tensor is worst, what its backward gave and what the numeric
    derivative says (``dense.W[1, 0]: backward gave -0.31, numeric 0.31 ± 3.0e-10``)."""
    d = t.worst_detail
    if d is None:
        return None
    return (f"{t.name}{format_index(d.index)}: backward gave {d.analytic:.6g}, "
            f"numeric {d.numeric:.6g} ± {d.error_estimate:.1e}")


def _worst_error(t: TensorResult) -> float:
    if t.max_rel_error is not None:
        return t.max_rel_error
    return max((d.rel_error for d in t.directions), default=0.0)


def what_is_wrong(layer: LayerResult) -> str:
    """What a stack layer's own check found wrong, in words."""
    wrong = [t for t in layer.own_tensors if t.status is Status.FAIL]
    params = ", ".join(t.name for t in layer.wrong_param_gradients)
    if layer.input_gradient_wrong and params:
        text = f"its input gradient and its parameter gradient of {params} are wrong"
    elif layer.input_gradient_wrong:
        text = "its input gradient is wrong"
    elif params:
        text = f"its parameter gradient of {params} is wrong"
    else:
        text = "its own check fails"
    clues = [t.hint.split(":")[0] for t in wrong if t.hint]
    return text + (f" ({'; '.join(clues)})" if clues else "")


def stack_line(report: Report) -> str | None:
    """For a stack, one line: where the error enters and which failures are inherited."""
    if not report.is_stack:
        return None
    checked = [layer for layer in report.layers if layer.own is not None]
    if not report.error_enters_at:
        odd = [f"{layer.name} {layer.own}" for layer in checked if layer.own is not Status.PASS]
        more = f" ({', '.join(odd)})" if odd else ""
        line = f"layers on their own: all {len(checked)} agree{more}"
    else:
        by_name = {layer.name: layer for layer in report.layers}
        line = "error enters at " + "; ".join(
            f"{name}: {what_is_wrong(by_name[name])}" for name in report.error_enters_at)
    sources: dict[str, list[str]] = {}
    for t in report.inherited:
        sources.setdefault(str(t.inherited_from), []).append(t.name)
    for source, names in sources.items():
        line += f" · inherited from {source}: {', '.join(names)}"
    entered = report.error_enters_at or ()
    unexplained = [t.name for t in report.failing_tensors
                   if t.inherited_from is None and t.layer not in entered]
    if unexplained:
        line += f" · not explained by any layer's own check: {', '.join(unexplained)}"
    return line
