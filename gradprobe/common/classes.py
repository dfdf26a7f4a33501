"""``dataclass`` for gradprobe's own classes: the standard decorator's behaviour, built faster.

The standard decorator compiles every method it writes (``__init__``, ``__repr__``,
``__eq__``, and for a frozen class ``__setattr__``, ``__delattr__`` and ``__hash__``) from
source, one ``exec`` each: for the few dozen classes a check loads that was over a third of
gradprobe's own import time, which a check of a fast forward pays on every start. Here only
``__init__`` is compiled (one ``exec`` a class, so it keeps its signature and its speed);
the other methods are shared functions that read the class's fields. The class carries the
same ``__dataclass_fields__`` (``dataclasses.fields``, ``replace``, ``asdict`` and
``is_dataclass`` work as before) and the same equality, hash, repr (fields with
``compare=False`` or ``repr=False`` left out as before), frozenness, defaults,
``default_factory`` and ``__post_init__``.

Only the plain forms gradprobe uses take this path: ``@dataclass`` and
``@dataclass(frozen=True)`` on a class with no base, no ``ClassVar``/``InitVar``, no method
of its own among those written here, and no field that opts out of ``init`` or sets
``hash`` or ``kw_only``; anything else goes to the standard decorator (as does everything
on a Python whose dataclasses keep their fields differently). Type checkers see the
standard decorator itself.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from dataclasses import dataclass as dataclass
else:

    def dataclass(cls: type | None = None, /, **options: Any) -> Any:
        """``dataclasses.dataclass``, built as the module docstring says."""
        if cls is None:
            return lambda c: _build(c, options)
        return _build(cls, options)


_standard = dataclasses.dataclass
_MISSING = dataclasses.MISSING
_FIELD = getattr(dataclasses, "_FIELD", None)  # how a Field is marked as a field proper
_PARAMS = getattr(dataclasses, "_DataclassParams", None)  # the decorator's record of its options
# The options that record holds, as the plain forms set them.
_OPTIONS = {"init": True, "repr": True, "eq": True, "order": False, "unsafe_hash": False,
            "match_args": True, "kw_only": False, "slots": False, "weakref_slot": False}


class _Factory:
    """The default of a parameter whose field has a default_factory (as the standard shows it)."""

    def __repr__(self) -> str:
        return "<factory>"


_FACTORY = _Factory()
_WRITTEN = ("__init__", "__repr__", "__eq__", "__hash__", "__setattr__", "__delattr__", "__slots__")


def _option_names() -> tuple[str, ...] | None:
    """The options the standard decorator records, in order (None: not all known here)."""
    code = getattr(getattr(_PARAMS, "__init__", None), "__code__", None)
    if code is None or _FIELD is None:
        return None
    names = tuple(code.co_varnames[1:code.co_argcount])
    return names if set(names) <= {*_OPTIONS, "frozen"} else None


_OPTION_NAMES = _option_names()


def _plain(cls: type, options: dict[str, Any]) -> bool:
    if _OPTION_NAMES is None or set(options) - {"frozen"} or cls.__bases__ != (object,):
        return False
    if any(name in cls.__dict__ for name in _WRITTEN):
        return False
    for annotation in cls.__dict__.get("__annotations__", {}).values():
        text = annotation if isinstance(annotation, str) else repr(annotation)
        if "ClassVar" in text or "InitVar" in text or "KW_ONLY" in text:
            return False
    return True


def _fields(cls: type) -> dict[str, dataclasses.Field[Any]] | None:
    """The class's fields in order, or None where the standard decorator must decide."""
    fields: dict[str, dataclasses.Field[Any]] = {}
    defaulted = False
    for name, annotation in cls.__dict__.get("__annotations__", {}).items():
        value = cls.__dict__.get(name, _MISSING)
        f = value if isinstance(value, dataclasses.Field) else dataclasses.field(default=value)
        if not (f.init and f.hash is None and f.kw_only is _MISSING):
            return None
        has_default = f.default is not _MISSING or f.default_factory is not _MISSING
        if (f.default is not _MISSING and type(f.default).__hash__ is None) or (defaulted and not has_default):
            return None  # a mutable default, or a field without one after defaults: its error
        defaulted |= has_default
        fields[name] = f
    return fields


def _build(cls: type, options: dict[str, Any]) -> type:
    fields = _fields(cls) if _plain(cls, options) else None
    if fields is None:
        return _standard(cls, **options)
    assert _PARAMS is not None and _OPTION_NAMES is not None
    frozen = bool(options.get("frozen", False))
    for name, f in fields.items():
        f.name, f.type, f.kw_only = name, cls.__annotations__[name], False
        f._field_type = _FIELD  # type: ignore[attr-defined]
        # The class attribute as the standard decorator leaves it: the default, or none.
        if f.default is not _MISSING:
            setattr(cls, name, f.default)
        elif name in cls.__dict__:
            delattr(cls, name)
    setattr(cls, "__dataclass_fields__", fields)
    setattr(cls, "__dataclass_params__",
            _PARAMS(*(frozen if name == "frozen" else _OPTIONS[name] for name in _OPTION_NAMES)))
    setattr(cls, "__match_args__", tuple(fields))
    setattr(cls, "__init__", _init(cls, fields, frozen))
    shown = tuple(name for name, f in fields.items() if f.repr)
    compared = tuple(name for name, f in fields.items() if f.compare)
    setattr(cls, "__repr__", _repr(shown))
    setattr(cls, "__eq__", _eq(compared))
    setattr(cls, "__hash__", _hash(compared) if frozen else None)
    if frozen:
        setattr(cls, "__setattr__", _frozen_setattr)
        setattr(cls, "__delattr__", _frozen_delattr)
    if cls.__dict__.get("__doc__") is None:
        cls.__doc__ = f"{cls.__name__}({', '.join(fields)})"
    return cls


def _init(cls: type, fields: dict[str, dataclasses.Field[Any]], frozen: bool) -> Any:
    """``__init__`` with one parameter per field, compiled once for the class."""
    scope: dict[str, Any] = {"_FACTORY": _FACTORY, "_set": object.__setattr__}
    params, body = ["self"], []
    for k, f in enumerate(fields.values()):
        value = f.name
        if f.default is not _MISSING:
            scope[f"_d{k}"] = f.default
            params.append(f"{f.name}=_d{k}")
        elif f.default_factory is not _MISSING:
            scope[f"_f{k}"] = f.default_factory
            params.append(f"{f.name}=_FACTORY")
            value = f"_f{k}() if {f.name} is _FACTORY else {f.name}"
        else:
            params.append(f.name)
        body.append(f"_set(self, {f.name!r}, {value})" if frozen else f"self.{f.name} = {value}")
    if hasattr(cls, "__post_init__"):
        body.append("self.__post_init__()")
    source = f"def __init__({', '.join(params)}):\n    " + "\n    ".join(body or ["pass"])
    exec(source, scope)  # the class's own field names, as the standard decorator writes them
    init = scope["__init__"]
    init.__qualname__ = f"{cls.__qualname__}.__init__"
    init.__module__ = cls.__module__
    init.__annotations__ = {**{name: f.type for name, f in fields.items()}, "return": None}
    return init


# The shared methods, made per class over the names of the fields they read.

def _repr(names: tuple[str, ...]) -> Any:
    running: set[int] = set()

    def __repr__(self: Any) -> str:
        if id(self) in running:  # an object that contains itself, as the standard repr guards
            return "..."
        running.add(id(self))
        try:
            inner = ", ".join(f"{name}={getattr(self, name)!r}" for name in names)
        finally:
            running.discard(id(self))
        return f"{type(self).__qualname__}({inner})"

    return __repr__


def _eq(names: tuple[str, ...]) -> Any:
    def __eq__(self: Any, other: Any) -> Any:
        if other.__class__ is self.__class__:
            return tuple(getattr(self, n) for n in names) == tuple(getattr(other, n) for n in names)
        return NotImplemented

    return __eq__


def _hash(names: tuple[str, ...]) -> Any:
    def __hash__(self: Any) -> int:
        return hash(tuple(getattr(self, n) for n in names))

    return __hash__


def _frozen_class(self: Any) -> type:
    """The frozen class that was decorated (a subclass of it may set attributes of its own)."""
    for klass in type(self).__mro__:
        if klass.__dict__.get("__setattr__") is _frozen_setattr:
            return klass
    return type(self)


def _frozen_setattr(self: Any, name: str, value: Any) -> None:
    if type(self) is _frozen_class(self) or name in self.__dataclass_fields__:
        raise dataclasses.FrozenInstanceError(f"cannot assign to field {name!r}")
    object.__setattr__(self, name, value)


def _frozen_delattr(self: Any, name: str) -> None:
    if type(self) is _frozen_class(self) or name in self.__dataclass_fields__:
        raise dataclasses.FrozenInstanceError(f"cannot delete field {name!r}")
    object.__delattr__(self, name)
