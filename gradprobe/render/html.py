"""The HTML report: one self-contained page for a whole run (inline CSS and SVG, nothing
fetched), with the verdict, the settings, a table per target and layer, and a map of
per-element relative error for every failing tensor.

A pure function of the report model: :func:`render_html` takes the runs (or one report)
and returns the page as a string; the CLI only writes it.
"""

from __future__ import annotations

import shlex
from collections.abc import Iterable, Sequence
from html import escape

from ..report.model import LayerResult, Report, TargetRun, TensorResult
from ..common.status import Status
from ..common.tensors import format_index
from ..common.wording import plural, verb
from .html_style import CSS
from .lines import stack_line, verdict, what_is_wrong
from .svgmap import legend, tensor_svg
from .text import change_cell

LISTED = 8  # coordinates named in a map's caption or a reason


def _e(value: object) -> str:
    return escape(str(value), quote=True)


def _num(value: float | None) -> str:
    return "–" if value is None else f"{value:.1e}"


def _shape(shape: tuple[int, ...]) -> str:
    return "×".join(str(n) for n in shape) if shape else "scalar"


def _indices(indices: Sequence[tuple[int, ...]], total: int) -> str:
    shown = ", ".join(format_index(i) for i in indices[:LISTED])
    return shown + (f" and {total - LISTED} more" if total > LISTED else "")


def _reasons(t: TensorResult) -> list[str]:
    """Why a tensor has its status, beyond the numbers in its row."""
    out = []
    if t.failed:
        out.append(f"{t.failed} of {plural(t.checked, 'checked coordinate')} "
                   f"{verb(t.failed, 'fails', 'fail')}")
    inherited = getattr(t, "inherited_from", None)
    if inherited:
        out.append(f"fails end to end only because the error enters in layer {inherited}")
    if t.hint:
        out.append(t.hint)
    if t.kinks:
        out.append(f"{plural(t.kinks, 'coordinate')} at a kink, where the analytic value lies "
                   f"between the one-sided slopes: {_indices(t.kink_indices, t.kinks)}")
    unsure = [c for c in t.details if c.status is Status.INCONCLUSIVE]
    if t.inconclusive:
        listed = "; ".join(f"{format_index(c.index)}: difference {abs(c.analytic - c.numeric):.1e}, "
                           f"error estimate {c.error_estimate:.1e}" for c in unsure[:LISTED])
        out.append(f"{plural(t.inconclusive, 'coordinate')} whose numeric estimate is noisier "
                   f"than the threshold" + (f" ({listed})" if listed else ""))
    if t.directions:
        off = sum(1 for d in t.directions if not d.ok)
        kinked = sum(1 for d in t.directions if d.kink)
        text = f"{plural(len(t.directions), 'random direction')} checked, {off} off"
        out.append(text + (f", {kinked} crossing kinks" if kinked else ""))
    if t.baseline is not None and t.baseline.reason:
        out.append(t.baseline.reason.removeprefix(f"{t.name}: "))
    if t.located_evaluations is not None:
        out.append(f"locating wrong coordinates took {plural(t.located_evaluations, 'evaluation')}")
    return out


def _then(t: TensorResult) -> str:
    """The baseline's worst relative error and the change, beside this run's."""
    b = t.baseline
    if b is None:
        return ""
    was = "" if b.change.value == "new" else f"{_num(b.max_rel_error)} ({_e(b.status)}) "
    return f'<td class="n base gp-{_e(b.change)}">{was}<span class="change">{_e(change_cell(t))}</span></td>'


def _row(t: TensorResult, k: int) -> str:
    checked = f"{t.checked:,}/{t.size:,}" if t.kind != "unknown" else "–"
    worst = _num(t.max_rel_error)
    if t.max_rel_error is None and t.directions:
        worst = _num(max(d.rel_error for d in t.directions)) + " (direction)"
    at = format_index(t.worst_index) if t.worst_index is not None else "–"
    anchor = f'<a href="#{_id(k, t.name)}">' if t.status is Status.FAIL and _has_map(t) else ""
    name = f"{anchor}{_e(t.name)}{'</a>' if anchor else ''}"
    reasons = "".join(f"<li>{_e(r)}</li>" for r in _reasons(t))
    return (
        f'<tr class="gp-{_e(t.status)}"><th scope="row" class="name">{name}</th>'
        f'<td>{_shape(t.shape)}</td><td><span class="status">{_e(t.status)}</span></td>'
        f'<td class="n">{checked}</td><td class="n">{worst}</td>{_then(t)}<td class="n">{_num(t.worst_noise)}</td>'
        f'<td class="n">{_num(t.max_abs_error)}</td><td class="idx">{at}</td>'
        f'<td class="why">{"<ul>" + reasons + "</ul>" if reasons else ""}</td></tr>'
    )


HEAD = ("tensor", "shape", "status", "checked", "worst rel", "± noise", "worst abs", "worst at", "why")
BASELINE_HEAD = "baseline's worst rel"


def _layer(layer: LayerResult, k: int, compared: bool = False) -> str:
    own = layer.own
    why = f" ({what_is_wrong(layer)})" if own is Status.FAIL else ""
    own_text = f' <span class="own">its own backward: {_e(own)}{_e(why)}</span>' if own else ""
    if not layer.tensors:
        return (f'<h3>layer {_e(layer.name)}{own_text}</h3>'
                '<p class="note">no params of its own: only its backward is checked, on its own.</p>')
    titles = HEAD[:5] + (BASELINE_HEAD,) + HEAD[5:] if compared else HEAD
    head = "".join(f'<th scope="col">{h}</th>' for h in titles)
    rows = "".join(_row(t, k) for t in layer.tensors)
    return (f'<h3>layer {_e(layer.name)}{own_text}</h3>'
            f'<table class="layer"><thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>')


def _id(k: int, name: str) -> str:
    """The anchor of a tensor's map in the section of target ``k``."""
    return f"map-{k}-" + "".join(ch if ch.isalnum() else f"_{ord(ch):x}" for ch in name)


def _has_map(t: TensorResult) -> bool:
    return t.error_map is not None and t.checked > 0


def _figure(t: TensorResult, threshold: float, k: int) -> str:
    picture = tensor_svg(t, threshold)
    rb, cb = picture.block
    block = f"; each cell shows the worst of {rb} × {cb} elements" if rb * cb > 1 else ""
    worst = [c for c in t.details if c.status is Status.FAIL]
    worst.sort(key=lambda c: -c.rel_error)
    listed = ", ".join(f"{format_index(c.index)} {c.rel_error:.1e}" for c in worst[:LISTED])
    caption = (f'<figcaption><strong class="name">{_e(t.name)}</strong> '
               f"{_e(_shape(t.shape))}: {_e(picture.how)}{block}; {t.checked:,} of "
               f"{t.size:,} {'element' if t.size == 1 else 'elements'} checked.")
    if listed:
        caption += f" Worst failing: {_e(listed)}."
    return (f'<figure class="gp-figure" id="{_id(k, t.name)}" data-tensor="{_e(t.name)}">'
            f"{caption}</figcaption>{picture.svg}</figure>")


def _maps(report: Report, k: int) -> str:
    failing = report.failing_tensors
    if not failing:
        return ""
    figures = [_figure(t, report.threshold, k) if _has_map(t) else
               f'<p class="nomap" data-tensor="{_e(t.name)}"><strong class="name">{_e(t.name)}</strong>: '
               f"no map, nothing was compared ({_e(t.hint or 'no gradient')}).</p>" for t in failing]
    return ('<h3>Where the gradients are wrong</h3><p class="note">Relative error per element on a '
            f"logarithmic scale: decades above the threshold {report.threshold:g}. Tensors with "
            "more than two dimensions are folded (rows run over every axis but the last); large "
            "ones are reduced to blocks showing their worst element. Coordinates at a kink are "
            "judged by the kink rule and drawn as within the threshold, outlined in small maps."
            f"</p>{legend()}" + "".join(figures))


def _settings(report: Report) -> str:
    items = [("threshold", f"{report.threshold:g}"), ("method", report.method),
             ("seed", str(report.seed)), ("computes in", report.compute_dtype),
             ("evaluations", str(report.evaluations)), ("time", f"{report.seconds:.2f} s")]
    if report.array_library != "numpy" or report.gradient_source != "backward":  # section 6
        items[4:4] = [("arrays", report.array_library), ("gradient from", report.gradient_source)]
    return '<dl class="settings">' + "".join(f"<dt>{k}</dt><dd>{_e(v)}</dd>" for k, v in items) + "</dl>"


def _section(run: TargetRun, index: int) -> str:
    out = [f'<section class="target" id="target-{index}"><h2>{_e(run.target)}</h2>']
    report = run.report
    if report is None:
        out.append(f'<p class="verdict gp-fail">could not run: {_e(run.error or "")}</p></section>')
        return "".join(out)
    out.append(f'<p class="verdict {"gp-ok" if report.ok else "gp-fail"}">{_e(verdict(report))}</p>')
    out.append(_settings(report))
    line = stack_line(report)
    if line is not None:
        out.append(f'<p class="enters"><strong>{_e(line)}</strong></p>')
    for text in report.errors:
        out.append(f'<p class="error">{_e(text)}</p>')
    for note in report.notes:
        out.append(f'<p class="note">note: {_e(note)}</p>')
    out.extend(_layer(layer, index, report.baseline is not None) for layer in report.layers)
    out.append(_maps(report, index))
    if report.second_order is not None:
        from .second_html import second_order_section

        out.append(second_order_section(report.second_order, report.threshold, index))
    out.append("</section>")
    return "".join(out)


def _summary(runs: Sequence[TargetRun]) -> str:
    rows = []
    for k, run in enumerate(runs):
        r = run.report
        outcome = "could not run" if r is None else "ok" if r.ok else "fail"
        failing = "–" if r is None else ", ".join(t.name for t in r.failing_tensors) or "none"
        rows.append(f'<tr class="{"gp-ok" if run.exit_code == 0 else "gp-fail"}">'
                    f'<th scope="row"><a href="#target-{k}">{_e(run.target)}</a></th>'
                    f'<td>{"–" if r is None else len(r.tensors)}</td><td>{_e(failing)}</td>'
                    f'<td><span class="status">{outcome}</span></td></tr>')
    return ('<table class="runs"><thead><tr><th scope="col">target</th><th scope="col">tensors</th>'
            '<th scope="col">failing tensors</th><th scope="col">outcome</th></tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table>")


def _command(runs: Sequence[TargetRun]) -> str:
    """The command a caller did not state, from what the reports hold."""
    first = next((r.report for r in runs if r.report is not None), None)
    words = ["gradprobe", "check", *(r.target for r in runs)]
    if first is not None:
        words += ["--fail-above", f"{first.threshold:g}", "--method", first.method, "--seed", str(first.seed)]
    return shlex.join(words)


def render_html(runs: Report | Iterable[TargetRun], command: str | None = None,
                generated: str | None = None) -> str:
    """The page for ``runs`` (or a single report). ``command``: what reproduces the run;
    ``generated``: a timestamp to show. Both are stated as given; nothing is looked up."""
    if isinstance(runs, Report):
        runs = [TargetRun(runs.target, 0 if runs.ok else 1, report=runs)]
    runs = list(runs)
    ok = all(r.exit_code == 0 for r in runs)
    bad = [r for r in runs if r.exit_code != 0]
    failing = sum(len(r.report.failing_tensors) for r in runs if r.report is not None)
    changed = sum(len(r.report.changed_for_worse) for r in runs if r.report is not None)
    headline = (f"ok: every tensor of {plural(len(runs), 'target')} agrees" if ok else
                f"FAIL: {len(bad)} of {plural(len(runs), 'target')} not ok, "
                f"{plural(failing, 'failing tensor')}")
    if changed:
        headline += f", {changed} regressed or worse since the baseline"
    meta = [("reproduce with", f"<code>{_e(command or _command(runs))}</code>")]
    if generated:
        meta.append(("generated", _e(generated)))
    dl = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in meta)
    sections = "".join(_section(run, k) for k, run in enumerate(runs))
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>gradprobe: {_e(headline)}</title><style>{CSS}</style></head><body>"
        f'<header><h1>gradprobe report</h1><p class="verdict {"gp-ok" if ok else "gp-fail"}" '
        f'id="verdict">{_e(headline)}</p><dl class="settings">{dl}</dl>'
        f"{_summary(runs) if len(runs) > 1 else ''}</header><main>{sections}</main></body></html>\n"
    )
