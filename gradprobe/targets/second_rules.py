"""What a target says of its second derivatives (protocol section 7): its own ``hvp`` or
``hessian`` function, or ``second_order = True`` (Hessian-vector products through the
framework's double backward, which only a forward-only torch or jax target has).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ..common.errors import TargetLoadError

DOUBLE_FIX = ("drop backward so the framework's reverse mode gives the gradient, or give "
              "hvp(params, inputs, v) or hessian(params, inputs) instead of second_order = True")


def second_order_functions(obj: Any, hvp: Any, hessian: Any) -> tuple[Callable[..., Any] | None,
                                                                        Callable[..., Any] | None]:
    """The target ``obj``'s ``hvp`` and ``hessian`` functions as found on it, checked (None if
    absent)."""
    for name, fn in (("hvp", hvp), ("hessian", hessian)):
        if fn is not None and not callable(fn):
            raise TargetLoadError(f"the target's {name} is a {type(fn).__name__}, not a function",
                                  value=fn)
    if hvp is not None and hessian is not None:
        raise TargetLoadError("the target gives both hvp and hessian; give one of them",
                              value=obj)
    return hvp, hessian


def double_backward(obj: Any, flag: Any, backward: Any, hvp: Any, hessian: Any) -> bool:
    """The target ``obj``'s ``second_order`` ``flag``: True asks for Hessian-vector products
    through the framework, which only a forward-only torch or jax target has."""
    if flag is None or flag is False:
        return False
    if flag is not True:
        raise TargetLoadError(f"the target's second_order is {flag!r}; it must be True or False",
                              value=flag)
    if hvp is not None or hessian is not None:
        raise TargetLoadError("the target gives second_order = True and also "
                              f"{'hvp' if hvp is not None else 'hessian'}; give one of them",
                              value=obj)
    if backward is not None:
        raise TargetLoadError(no_double_backward("it gives its own backward"), value=backward,
                              fix=DOUBLE_FIX)
    return True


def no_double_backward(why: str) -> str:
    return ("second_order = True takes Hessian-vector products through the framework's double "
            f"backward, so it needs a forward-only torch or jax target, but {why}")
