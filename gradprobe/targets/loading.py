"""Loading a target by its entry-point string, here or again in a worker process.

``load_any("nets/mlp.py:dense_case")`` imports the module, takes the attribute (called when
it is a class or function) and builds a stack when it gives ``layers``, else a flat target
(:mod:`.stack`, :mod:`.target`). The targets it builds carry :func:`worker_forward`, with
which a worker process rebuilds forward from the spec alone (setup() is not called again).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any

from ..common.errors import ProbeError
from ..common.guard import guarded
from .stack import PART, StackTarget, is_stack, stack_from_object
from .target import Target, _functions, resolve_object, target_from_object


def load_any(spec: str) -> Target | StackTarget:
    """The target named by ``spec``: a stack when it gives ``layers``, else a flat target."""
    try:
        with guarded():
            obj = resolve_object(spec)
            if is_stack(obj):
                return replace(stack_from_object(obj, label=spec, spec=spec), loader=worker_forward)
            return replace(target_from_object(obj, label=spec, spec=spec), loader=worker_forward)
    except ProbeError as exc:
        raise exc.with_target(spec)


def load_target(spec: str) -> Target:
    """The flat target named by ``spec``; errors name the spec."""
    try:
        with guarded():
            loaded = target_from_object(resolve_object(spec), label=spec, spec=spec)
            return replace(loaded, loader=worker_forward)
    except ProbeError as exc:
        raise exc.with_target(spec)


def load_functions(spec: str) -> tuple[Callable[..., Any], Callable[..., Any]]:
    """forward and backward of ``spec``, for worker processes: setup() is not called again
    (the protocol calls it once per check; workers receive its arrays instead). A stack's
    composed functions, or one layer's, when ``spec`` names a stack (see :mod:`.stack`)."""
    from .stack_split import worker_functions  # worker processes (--jobs) only: loaded then

    try:
        with guarded():
            obj = resolve_object(spec.split(PART)[0])
            found = worker_functions(obj, spec)
            return found if found is not None else _functions(obj, optional=True)
    except ProbeError as exc:
        raise exc.with_target(spec.split(PART)[0])


def worker_forward(spec: str) -> Callable[..., Any]:
    """forward of ``spec``, rebuilt in a worker process."""
    return load_functions(spec)[0]
