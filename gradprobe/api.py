"""The Python API: ``probe`` for functions and arrays, ``probe_target`` for an entry point.

Both return the :class:`~gradprobe.report.model.Report` the CLI renders. When the check cannot run
they raise gradprobe's own exceptions (subclasses of :class:`~gradprobe.common.errors.ProbeError`)
with the CLI's one-sentence message, chained to the user's exception. The caller's arrays are
bitwise unchanged either way. ``render_text``, ``report_dict`` and ``raise_if_failed`` are the
report's outputs as free functions (the report model does not know its renderers).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any

from .report.baseline_file import baseline_of, run_against
from .engine.runner import run_check
from .settings.options import CheckOptions
from .report.model import Report
from .targets.loading import load_any
from .targets.stack import StackTarget, is_stack, stack, stack_from_object
from .engine.stack_run import run_any, run_stack
from .targets.target import Target, target_from_object

if TYPE_CHECKING:
    from concurrent.futures import Executor


def _options(values: Mapping[str, Any]) -> CheckOptions:
    return CheckOptions().with_values(**values)


def probe(
    forward: Callable[..., Any],
    backward: Callable[..., Any] | None,
    params: Mapping[str, Any],
    inputs: Mapping[str, Any] | None = None,
    *,
    executor: Executor | None = None,
    label: str | None = None,
    hvp: Callable[..., Any] | None = None,
    hessian: Callable[..., Any] | None = None,
    **options: Any,
) -> Report:
    """Check ``backward`` against central differences of ``forward`` at ``params``/``inputs``.
    ``backward`` None: the framework's reverse mode of a torch or JAX ``forward`` is checked.

    ``options`` are the settings of :class:`~gradprobe.settings.options.CheckOptions`: ``threshold``,
    ``seed``, ``method``, ``sample``, ``directions``, ``jobs``, ``recheck``, ``inconclusive``,
    ``baseline`` (an earlier JSON report to compare with), ``baseline_growth`` and
    ``second_order``. ``label`` names the target in reports (default: the forward function's
    name). ``hvp(params, inputs, v)`` or ``hessian(params, inputs)``, when given, are checked
    after the gradient (protocol section 7; the report's ``second_order``).
    """
    if hvp is not None and hessian is not None:
        from .common.errors import UsageProblem

        raise UsageProblem("give hvp or hessian, not both")
    checked = _options(options)
    baseline = baseline_of(checked)
    target = Target(label or name_of(forward), forward, backward, params, inputs or {},
                    hvp=hvp, hessian=hessian)
    return run_against(baseline, target.label, checked, lambda o: run_check(target, o, executor=executor))


def name_of(forward: Callable[..., Any]) -> str:
    """``module.function`` for a named forward; ``<lambda in module>`` for a lambda."""
    name = getattr(forward, "__name__", None) or type(forward).__name__
    module = getattr(forward, "__module__", None)
    if name == "<lambda>":
        return f"<lambda in {module}>" if module else "<lambda>"
    return f"{module}.{name}" if module and module != "__main__" else name


def probe_target(target: str | Any, *, executor: Executor | None = None, **options: Any) -> Report:
    """Check a target as ``gradprobe check`` does: an entry-point string, a
    :class:`~gradprobe.targets.target.Target` (e.g. from :func:`~gradprobe.targets.adapters.layer_target`), a
    stack, or any object with forward, backward and setup() or params (or layers)."""
    checked = _options(options)
    baseline = baseline_of(checked)
    loaded: Target | StackTarget
    if isinstance(target, str):
        loaded = load_any(target)
    elif isinstance(target, (Target, StackTarget)):
        loaded = target
    elif is_stack(target):
        loaded = stack_from_object(target, label=type(target).__name__)
    else:
        loaded = target_from_object(target, label=type(target).__name__)
    name = target if isinstance(target, str) else loaded.label
    return run_against(baseline, name, checked, lambda o: run_any(loaded, o, executor=executor))


def probe_stack(
    layers: Any,
    params: Mapping[str, Any] | None = None,
    inputs: Mapping[str, Any] | None = None,
    *,
    executor: Executor | None = None,
    label: str = "<stack>",
    **options: Any,
) -> Report:
    """Check a stack of layers (protocol section 5): every layer's backward on its own and the
    network end to end. ``layers`` is a sequence of named layers or a mapping name -> layer;
    or a stack built by :func:`gradprobe.targets.adapters.object_stack`, then without arrays."""
    checked = _options(options)
    baseline = baseline_of(checked)
    if isinstance(layers, StackTarget):
        target = layers
    else:
        target = stack(layers, params or {}, inputs or {}, label)
    return run_against(baseline, target.label, checked, lambda o: run_stack(target, o, executor=executor))


def render_text(report: Report, width: int = 120) -> str:
    """The per-layer table and verdict line as plain text."""
    from .render.terminal import render_text as render

    return render(report, width=width)


def report_dict(report: Report) -> dict[str, Any]:
    """The JSON report (schema ``gradprobe.report/1``) as a dict."""
    from .render.json import report_dict as as_dict

    return as_dict(report)


def raise_if_failed(report: Report) -> Report:
    """Raise AssertionError when the report is not ok: a first line naming the failing tensors
    and the worst error, then the per-layer table."""
    __tracebackhide__ = True
    if not report.ok:
        from .render.lines import failure_line

        raise AssertionError(failure_line(report) + "\n" + render_text(report))
    return report
