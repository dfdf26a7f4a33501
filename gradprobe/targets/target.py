"""A flat target, and reading one off an object (protocol sections 1 and 2).

:func:`resolve_object` imports the module an entry-point string names, takes the attribute
and calls it when it is a class or function; :func:`target_from_object` reads
forward/backward/params/inputs off the result (entry points are loaded by :mod:`.loading`).
Every failure is a :class:`TargetLoadError` with one sentence naming what is wrong.
"""

from __future__ import annotations

import importlib
import importlib.util
import os
import sys
import types
import zlib
from collections.abc import Callable, Mapping
from dataclasses import field
from pathlib import Path
from typing import Any

from ..common.classes import dataclass
from ..common.errors import TargetLoadError, summarise
from ..common.guard import ExitAttempt, exit_error
from ..common.spec import is_file_spec, split_spec
from .neighbours import note_neighbours, own_neighbours
from .second_rules import double_backward, second_order_functions


@dataclass(frozen=True)
class Target:
    """What a check needs: the two functions and the arrays at which to check them."""

    label: str
    forward: Callable[..., Any]
    backward: Callable[..., Any] | None  # None: the framework's reverse mode (torch, jax)
    params: Mapping[str, Any]
    inputs: Mapping[str, Any] = field(default_factory=dict)
    spec: str | None = None  # the entry-point string, when loaded from one
    # forward of ``spec`` rebuilt in a worker process (a module-level function, so it
    # pickles; set by :mod:`.loading`); None: workers receive forward itself
    loader: Callable[[str], Callable[..., Any]] | None = field(default=None, compare=False)
    # Second derivatives (protocol section 7), when the target gives them.
    hvp: Callable[..., Any] | None = None
    hessian: Callable[..., Any] | None = None
    # ``second_order = True``: H v by the framework's double backward (forward-only targets)
    double_backward: bool = False

    @property
    def gives_second_derivatives(self) -> bool:
        """It gives ``hvp`` or ``hessian`` (double backward is turned into an ``hvp``)."""
        return self.hvp is not None or self.hessian is not None


MISSING_FIX = {  # what to write when the target lacks one of its functions
    "forward": "define forward(params, inputs) returning the loss (or an output array)",
    "backward": ("define backward(params, inputs) returning the loss's gradient as a mapping "
                 "shaped like params"),
}


def _call_user(fn: Callable[[], Any], what: str) -> Any:
    """``fn()``; any exception of the user's but Ctrl-C becomes one TargetLoadError sentence."""
    try:
        return fn()
    except KeyboardInterrupt:
        raise
    except (SystemExit, ExitAttempt) as exc:
        who = "the module" if what == "importing it" else what.removeprefix("calling ")
        raise exit_error(exc, who) from exc
    except BaseException as exc:
        raise TargetLoadError(f"{what} raised {summarise(exc)}", value=fn,
                              fix=framework_fix(exc) or "fix it there (--traceback shows where)") from exc


# Frameworks a target may be written with, and the extra of gradprobe that brings each.
EXTRAS = {"torch": "torch", "jax": "jax", "jaxlib": "jax", "array_api_strict": "array-api",
          "ml_dtypes": "frameworks"}


def framework_fix(exc: BaseException) -> str | None:
    """The fix for a framework that is not installed or a GPU that is not there (None if neither)."""
    if isinstance(exc, ModuleNotFoundError) and exc.name:
        root = exc.name.partition(".")[0]
        if root in EXTRAS:
            return (f"the target is written with {root}, which is not installed here: install it "
                    f"with pip install 'gradprobe[{EXTRAS[root]}]'")
        if root == "cupy":  # no extra: its wheels are built per CUDA version
            return ("the target is written with cupy, which is not installed here: install the "
                    "build for your CUDA version (pip install cupy-cuda12x) where that GPU is")
        return None
    text = str(exc)
    torch = sys.modules.get("torch")  # a GPU that is there: the error is about something else
    if torch is not None and torch.cuda.is_available():
        return None
    if any(s in text for s in ("CUDA", "cuda", "GPU", "not compiled with", "NVIDIA driver", "'gpu'")):
        return ("the arrays ask for a GPU that this machine does not have: create them on the "
                "CPU (device='cpu'), or run where that GPU is")
    return None


def _import_file(location: str) -> Any:
    path = Path(location)
    if not path.is_file():
        hint = " (it is a folder)" if path.is_dir() else ""
        raise TargetLoadError(f"no such file {location}{hint}", value=location,
                              fix="name a Python file (a path from the current folder) or a module")
    resolved = path.resolve()
    name = "_gradprobe_target_" + f"{zlib.crc32(str(resolved).encode()):08x}"
    spec = importlib.util.spec_from_file_location(name, resolved)
    if spec is None or spec.loader is None:
        raise TargetLoadError(f"{location} cannot be imported as a Python file", value=location)
    module = importlib.util.module_from_spec(spec)
    folder = str(resolved.parent)
    before = own_neighbours(folder)
    sys.path.insert(0, folder)
    sys.modules[name] = module
    try:
        _call_user(lambda: spec.loader.exec_module(module), "importing it")  # type: ignore[union-attr]
    except BaseException:
        sys.modules.pop(name, None)
        raise
    finally:
        _remove_first(sys.path, folder)
        note_neighbours(before, folder)
    return module



def _import_module(location: str) -> Any:
    here = os.getcwd()
    sys.path.insert(0, here)
    try:
        return importlib.import_module(location)
    except ModuleNotFoundError as exc:
        if exc.name and (location == exc.name or location.startswith(exc.name + ".")):
            raise TargetLoadError(
                f"no module named {location} on sys.path or in the current folder "
                "(name a file as path/to/file.py)",
                value=location, fix="",
            ) from exc
        raise TargetLoadError(f"importing it raised {summarise(exc)}", value=location,
                              fix=framework_fix(exc) or "install the missing module or fix the import") from exc
    except KeyboardInterrupt:
        raise
    except (SystemExit, ExitAttempt) as exc:
        raise exit_error(exc, "the module") from exc
    except BaseException as exc:
        raise TargetLoadError(f"importing it raised {summarise(exc)}", value=location,
                              fix=framework_fix(exc) or "fix the module so it imports (--traceback shows where)") from exc
    finally:
        _remove_first(sys.path, here)


def _remove_first(items: list[str], value: str) -> None:
    if value in items:
        items.remove(value)


def _attribute_names(obj: Any) -> list[str]:
    if isinstance(obj, Mapping):
        return [str(k) for k in obj]
    return [n for n in dir(obj) if not n.startswith("_")]


def _get(obj: Any, name: str, default: Any = None) -> Any:
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def resolve_object(spec: str) -> Any:
    """The target object named by ``spec`` (section 1 of the protocol)."""
    location, attr = split_spec(spec)
    module = _import_file(location) if is_file_spec(location) else _import_module(location)
    if attr is None:
        return module
    missing = object()
    obj = _call_user(lambda: _attribute_or(module, attr, missing), f"looking up {attr}")
    if obj is missing:
        import difflib

        close = difflib.get_close_matches(attr, _attribute_names(module), n=1)
        tip = f"; did you mean {close[0]!r}?" if close else ""
        raise TargetLoadError(f"{location} has no attribute {attr!r}{tip}", value=attr,
                              fix="" if tip else "name a function, class or object it defines")
    if isinstance(obj, (type, types.FunctionType)):
        obj = _call_user(obj, f"calling {attr}()")
    return obj


def _attribute_or(module: Any, attr: str, missing: Any) -> Any:
    """``module.attr``, or ``missing`` where the module has no such attribute (a module's own
    ``__getattr__`` may raise anything else, which is the user's error)."""
    try:
        return getattr(module, attr)
    except AttributeError:
        return missing


def _functions(obj: Any, optional: bool = False) -> tuple[Callable[..., Any], Callable[..., Any]]:
    """forward and backward; with ``optional`` a missing backward is None (forward-only
    targets of a framework, see :mod:`.frameworks`)."""
    found: list[Any] = []
    for name in ("forward", "backward"):
        fn = _get(obj, name)
        if fn is None and optional and name == "backward":
            found.append(None)
            continue
        if fn is None:
            raise TargetLoadError(f"the target has no {name} function", value=name,
                                  fix=MISSING_FIX[name])
        if not callable(fn):
            raise TargetLoadError(
                f"the target's {name} is a {type(fn).__name__}, not a function", value=fn
            )
        found.append(fn)
    return found[0], found[1]


def _arrays(obj: Any) -> tuple[Mapping[str, Any], Mapping[str, Any]]:
    setup = _get(obj, "setup")
    if setup is not None:
        if not callable(setup):
            raise TargetLoadError("the target's setup is not a function", value=setup)
        result = _call_user(setup, "setup()")
        if not (isinstance(result, tuple) and len(result) == 2):
            got = f"a tuple of {len(result)}" if isinstance(result, tuple) else type(result).__name__
            raise TargetLoadError(
                f"setup() must return (params, inputs) but returned {got}", value=result,
                fix="return a pair of mappings, e.g. return {'w': w}, {'x': x}")
        params, inputs = result
    else:
        params = _get(obj, "params")
        if params is None:
            raise TargetLoadError("the target has neither setup() nor params", value=obj,
                              fix="define setup() returning (params, inputs), or a params mapping")
        inputs = _get(obj, "inputs", None)
        inputs = {} if inputs is None else inputs
    for what, value in (("params", params), ("inputs", inputs)):
        if not isinstance(value, Mapping):
            raise TargetLoadError(
                f"{what} must be a mapping of name -> array, not {type(value).__name__}",
                value=value, fix="give a dict such as {'w': np.zeros(3)}")
    return params, inputs


def target_from_object(obj: Any, label: str, spec: str | None = None) -> Target:
    """Read forward, backward and the arrays off a target object."""
    forward, backward = _functions(obj, optional=True)
    params, inputs = _arrays(obj)
    if backward is None:
        from .boundary import describe  # local: numpy targets never need it

        if describe(params, inputs).library not in ("torch", "jax"):
            raise TargetLoadError("the target has no backward function", value="backward",
                                  fix=MISSING_FIX["backward"])
    hvp, hessian = second_order_functions(obj, _get(obj, "hvp"), _get(obj, "hessian"))
    double = double_backward(obj, _get(obj, "second_order"), backward, hvp, hessian)
    return Target(label, forward, backward, params, inputs, spec, hvp=hvp, hessian=hessian,
                  double_backward=double)
