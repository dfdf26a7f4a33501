"""The Python API: ``probe`` for functions and arrays, ``probe_target`` for an entry point.

Both return the :class:`~gradprobe.report.Report` the CLI renders. When the check cannot run
they raise gradprobe's own exceptions (subclasses of :class:`~gradprobe.errors.ProbeError`)
with the CLI's one-sentence message, chained to the user's exception. The caller's arrays are
bitwise unchanged either way.
"""

from __future__ import annotations

from concurrent.futures import Executor
from typing import Any, Callable, Mapping

from .engine.runner import run_check
from .options import CheckOptions
from .report import Report
from .stack import StackTarget, load_any, stack
from .stack_check import run_any, run_stack
from .target import Target


def _options(values: Mapping[str, Any]) -> CheckOptions:
    return CheckOptions().with_values(**values)


def probe(
    forward: Callable[..., Any],
    backward: Callable[..., Any],
    params: Mapping[str, Any],
    inputs: Mapping[str, Any] | None = None,
    *,
    executor: Executor | None = None,
    label: str | None = None,
    **options: Any,
) -> Report:
    """Check ``backward`` against central differences of ``forward`` at ``params``/``inputs``.

    ``options`` are the fields of :class:`~gradprobe.options.CheckOptions`: ``threshold``,
    ``seed``, ``method``, ``sample``, ``directions``, ``jobs``, ``recheck``, ...
    ``label`` names the target in reports (default: the forward function's name).
    """
    target = Target(label or name_of(forward), forward, backward, params, inputs or {})
    return run_check(target, _options(options), executor=executor)


def name_of(forward: Callable[..., Any]) -> str:
    """``module.function`` for a named forward; ``<lambda in module>`` for a lambda."""
    name = getattr(forward, "__qualname__", None) or type(forward).__name__
    module = getattr(forward, "__module__", None)
    if name == "<lambda>":
        return f"<lambda in {module}>" if module else "<lambda>"
    return f"{module}.{name}" if module and module != "__main__" else name


def probe_target(spec: str, *, executor: Executor | None = None, **options: Any) -> Report:
    """Check the target named by an entry-point string (a stack too), as ``gradprobe check``
    does."""
    return run_any(load_any(spec), _options(options), executor=executor)


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
    or a stack built by :func:`gradprobe.adapters.object_stack`, then without arrays."""
    if isinstance(layers, StackTarget):
        target = layers
    else:
        target = stack(layers, params or {}, inputs or {}, label)
    return run_stack(target, _options(options), executor=executor)
