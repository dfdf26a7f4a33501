"""The reservoir release rule of reservoir_release.py, with the Gauss-Newton product passed
off as the Hessian-vector product.

``hvp`` returns J'(J v) only and drops the residual-weighted second derivatives of the
rule: close to the Hessian when the fit is perfect, wrong everywhere else. The blocks
rule.a × rule.b, rule.b × rule.a and rule.b × rule.b fail; the error enters at the Hessian.

    gradprobe check samples/reservoir_release_buggy.py   # exit 1
"""

import numpy as np
from reservoir_release import SEASONS, _jv, _parts, backward, forward, setup  # noqa: F401


def hvp(params, inputs, v):
    r, power, log_s = _parts(params, inputs)
    a = params["rule"]["a"]
    jv = _jv(params, inputs, v, power, log_s)
    hs = np.bincount(inputs["season"], weights=jv * inputs["inflow"], minlength=SEASONS)
    # bug: the terms r * (second derivatives of the rule) are left out
    return {"rule": {"a": np.array(jv @ power), "b": np.array(jv @ (a * power * log_s))},
            "share": hs}
