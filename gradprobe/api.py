"""The Python API: ``probe`` for functions and arrays, ``probe_target`` for an entry point.

Both return the :class:`~gradprobe.report.Report` the CLI renders. When the check cannot run
they raise gradprobe's own exceptions (subclasses of :class:`~gradprobe.errors.ProbeError`)
with the CLI's one-sentence message, chained to the user's exception. The caller's arrays are
bitwise unchanged either way. ``render_text``, ``report_dict`` and ``raise_if_failed`` are the
report's outputs as free functions (the report model does not know its renderers).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Callable, Mapping

from .engine.runner import run_check
from .options import CheckOptions
from .report import Report
from .target import Target, load_target, target_from_object

if TYPE_CHECKING:
    from concurrent.futures import Executor


def _options(values: Mapping[str, Any]) -> CheckOptions:
    return CheckOptions().with_values(**values)


def probe(
    forward: Callable[..., Any],
    backward: Callable[..., Any],
    params: Mapping[str, Any],
    inputs: Mapping[str, Any] | None = None,
    *,
    executor: Executor | None = None,
    label: str = "<python>",
    **options: Any,
) -> Report:
    """Check ``backward`` against central differences of ``forward`` at ``params``/``inputs``.

    ``options`` are the settings of :class:`~gradprobe.options.CheckOptions`: ``threshold``,
    ``seed``, ``method``, ``sample``, ``directions``, ``jobs``, ``recheck``, ``inconclusive``.
    """
    target = Target(label, forward, backward, params, inputs or {})
    return run_check(target, _options(options), executor=executor)


def probe_target(target: str | Any, *, executor: Executor | None = None, **options: Any) -> Report:
    """Check a target as ``gradprobe check`` does: an entry-point string, a
    :class:`~gradprobe.target.Target` (e.g. from :func:`~gradprobe.adapters.layer_target`) or
    any object with forward, backward and setup() or params."""
    checked = _options(options)
    if isinstance(target, str):
        loaded = load_target(target)
    elif isinstance(target, Target):
        loaded = target
    else:
        loaded = target_from_object(target, label=type(target).__name__)
    return run_check(loaded, checked, executor=executor)


def render_text(report: Report, width: int = 120) -> str:
    """The per-layer table and verdict line as plain text."""
    from .render.terminal import render_text as render

    return render(report, width=width)


def report_dict(report: Report) -> dict[str, Any]:
    """The JSON report (schema ``gradprobe.report/1``) as a dict."""
    from .render.json import report_dict as as_dict

    return as_dict(report)


def raise_if_failed(report: Report) -> Report:
    """Raise AssertionError carrying the per-layer table when the report is not ok."""
    __tracebackhide__ = True
    if not report.ok:
        raise AssertionError("gradient check failed\n" + render_text(report))
    return report
