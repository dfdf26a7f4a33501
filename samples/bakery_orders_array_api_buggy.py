"""The bakery of bakery_orders_array_api.py with the observed orders left out of the
gradient: x^T exp(x w) instead of x^T (exp(x w) - y).

    gradprobe check samples/bakery_orders_array_api_buggy.py  # exit 1, names w
"""

import array_api_strict as xp
from bakery_orders_array_api import forward, setup  # noqa: F401  (reused)


def backward(params, inputs):
    eta = inputs["x"] @ params["w"]
    return {"w": xp.matrix_transpose(inputs["x"]) @ xp.exp(eta)}  # bug: the - y term is missing
