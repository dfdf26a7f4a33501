"""Reservoir release rule: fitting how much water a dam operator releases each week, with a
hand-written Hessian-vector product for a trust-region fit.

Over 52 weeks the release is modelled from the storage ``S`` (in hm³, scaled to about 1)
and the inflow ``I`` of the week, with a seasonal share of the inflow passed straight on:

    release = rule.a * S ** rule.b + share[season] * I

The loss is half the sum of squared differences from the recorded releases. Its Hessian is
the Gauss-Newton term J'J plus the residual-weighted second derivatives of the rule
(``S**b ln S`` across a and b, ``a S**b (ln S)**2`` for b twice); ``hvp`` returns H v
without forming H.

    gradprobe check samples/reservoir_release.py     # exit 0: gradient and hvp agree
"""

import numpy as np

WEEKS, SEASONS = 52, 4


def setup():
    rng = np.random.default_rng(52)
    storage = rng.uniform(0.6, 1.6, size=WEEKS)
    inflow = rng.gamma(2.0, 0.2, size=WEEKS)
    season = (np.arange(WEEKS) // 13).astype(np.int64)
    recorded = 0.7 * storage**0.8 + np.array([0.2, 0.5, 0.3, 0.1])[season] * inflow
    recorded = recorded + rng.normal(scale=0.05, size=WEEKS)
    params = {"rule": {"a": np.array(0.6), "b": np.array(0.9)},
              "share": np.array([0.25, 0.4, 0.35, 0.15])}
    return params, {"storage": storage, "inflow": inflow, "season": season, "recorded": recorded}


def _parts(params, inputs):
    s, season = inputs["storage"], inputs["season"]
    a, b = params["rule"]["a"], params["rule"]["b"]
    power = s**b
    log_s = np.log(s)
    r = a * power + params["share"][season] * inputs["inflow"] - inputs["recorded"]
    return r, power, log_s


def forward(params, inputs):
    r, _, _ = _parts(params, inputs)
    return 0.5 * float(r @ r)


def backward(params, inputs):
    r, power, log_s = _parts(params, inputs)
    a = params["rule"]["a"]
    share = np.bincount(inputs["season"], weights=r * inputs["inflow"], minlength=SEASONS)
    return {"rule": {"a": np.array(r @ power), "b": np.array(r @ (a * power * log_s))},
            "share": share}


def _jv(params, inputs, v, power, log_s):
    """J v: how the residuals move along v."""
    a = params["rule"]["a"]
    return (power * v["rule"]["a"] + a * power * log_s * v["rule"]["b"]
            + v["share"][inputs["season"]] * inputs["inflow"])


def hvp(params, inputs, v):
    r, power, log_s = _parts(params, inputs)
    a = params["rule"]["a"]
    jv = _jv(params, inputs, v, power, log_s)
    va, vb = v["rule"]["a"], v["rule"]["b"]
    # J'(J v), then the residual-weighted second derivatives of the rule.
    ha = jv @ power + (r * power * log_s) @ np.full_like(r, vb)
    hb = jv @ (a * power * log_s) + (r * power * log_s) @ np.full_like(r, va) \
        + (r * a * power * log_s**2) @ np.full_like(r, vb)
    hs = np.bincount(inputs["season"], weights=jv * inputs["inflow"], minlength=SEASONS)
    return {"rule": {"a": np.array(ha), "b": np.array(hb)}, "share": hs}
