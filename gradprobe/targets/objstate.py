"""Leaving the user's layer objects exactly as they were.

Calling a layer object's ``forward`` or ``backward`` changes it: caches are overwritten,
counters go up, a batch-norm layer moves its running statistics (often in place). A
:class:`Snapshot` records an object's state before a call: the binding of every attribute,
the items of every dict and list it holds, the bytes of every array, recursively through the
plain objects it holds; :meth:`Snapshot.restore` puts all of it back, identities included, so
arrays the user holds references to stay the very same objects with the same bytes.
"""

from __future__ import annotations

import sys
import types
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

MAX_DEPTH = 6
_SKIP = (types.ModuleType, types.FunctionType, types.BuiltinFunctionType, types.MethodType, type)


def _slots(obj: Any) -> list[str]:
    names: list[str] = []
    for klass in type(obj).__mro__:
        slots = getattr(klass, "__slots__", ())
        names += [slots] if isinstance(slots, str) else [s for s in slots if s != "__dict__"]
    return names


class Snapshot:
    """The state of some objects, to be put back by :meth:`restore`."""

    def __init__(self, *objects: Any) -> None:
        self._seen: set[int] = set()
        self._attrs: list[tuple[Any, dict[str, Any]]] = []
        self._slots: list[tuple[Any, dict[str, Any]]] = []
        self._dicts: list[tuple[dict, list[tuple[Any, Any]]]] = []
        self._lists: list[tuple[list, list[Any]]] = []
        self._arrays: list[tuple[np.ndarray, np.ndarray]] = []
        self._tensors: list[tuple[Any, Any]] = []  # torch tensors (written in place by torch ops)
        self._torch = sys.modules.get("torch")
        for obj in objects:
            self._record(obj, 0)

    def _record(self, value: Any, depth: int) -> None:
        if depth > MAX_DEPTH or id(value) in self._seen or isinstance(value, _SKIP):
            return
        if isinstance(value, (str, bytes, int, float, complex, bool)) or value is None:
            return
        self._seen.add(id(value))
        if isinstance(value, np.ndarray):
            if value.flags.writeable:  # a read-only array cannot have been written into
                self._arrays.append((value, value.copy()))
            return
        if self._torch is not None and isinstance(value, self._torch.Tensor):
            self._tensors.append((value, value.detach().clone()))
            return
        if isinstance(value, dict):
            self._dicts.append((value, list(value.items())))
            children: list[Any] = list(value.values())
        elif isinstance(value, list):
            self._lists.append((value, list(value)))
            children = list(value)
        elif isinstance(value, tuple):
            children = list(value)
        else:
            state = getattr(value, "__dict__", None)
            children = []
            if isinstance(state, dict):
                self._attrs.append((value, dict(state)))
                children += list(state.values())
            slots = {n: getattr(value, n) for n in _slots(value) if hasattr(value, n)}
            if slots:
                self._slots.append((value, slots))
                children += list(slots.values())
        for child in children:
            self._record(child, depth + 1)

    def restore(self) -> None:
        """Put every recorded binding, item and byte back."""
        for obj, attrs in self._attrs:
            state = vars(obj)
            if state.keys() != attrs.keys() or any(state[k] is not v for k, v in attrs.items()):
                state.clear()
                state.update(attrs)
        for obj, slots in self._slots:
            for name in _slots(obj):
                if name in slots:
                    object.__setattr__(obj, name, slots[name])
                elif hasattr(obj, name):
                    object.__delattr__(obj, name)
        for d, items in self._dicts:
            if len(d) != len(items) or any(d.get(k, d) is not v for k, v in items):
                d.clear()
                d.update(items)
        for lst, items in self._lists:
            if len(lst) != len(items) or any(a is not b for a, b in zip(lst, items)):
                lst[:] = items
        for array, saved in self._arrays:
            if array.shape == saved.shape and array.tobytes() != saved.tobytes():
                np.copyto(array, saved)
        torch = self._torch  # set whenever a tensor was kept
        for tensor, kept in self._tensors:
            assert torch is not None
            if tensor.shape == kept.shape and not torch.equal(tensor.detach(), kept):
                with torch.no_grad():
                    tensor.copy_(kept)


@contextmanager
def preserved(*objects: Any) -> Iterator[None]:
    """Run the block, then put ``objects`` back as they were (also on errors and Ctrl-C)."""
    snapshot = Snapshot(*objects)
    try:
        yield
    finally:
        snapshot.restore()
