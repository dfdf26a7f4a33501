"""Claims-count regression: a Poisson model of motor-insurance claims with a Newton solver's
hand-written Hessian.

Each of 40 policies has three standardised rating factors (driver age, vehicle power, urban
density) and an exposure in policy-years; its claim count is Poisson with mean
``exposure * exp(x @ coef + base)``. The loss is the negative log-likelihood (constant terms
dropped) plus a small ridge penalty on ``coef``. Besides the gradient, the target gives the
dense Hessian a Newton step would solve with: in flattened param order (``rating.coef``'s
three elements, then ``rating.base``),

    H = [[X' diag(mu) X + ridge I,  X' mu],
         [mu' X,                    sum(mu)]]

    gradprobe check samples/claims_count.py      # exit 0: gradient and Hessian agree
"""

import numpy as np

POLICIES, FACTORS, RIDGE = 40, 3, 0.5


def setup():
    rng = np.random.default_rng(31)
    x = rng.normal(size=(POLICIES, FACTORS))
    exposure = rng.uniform(0.2, 1.0, size=POLICIES)
    coef = np.array([0.3, -0.2, 0.15])
    claims = rng.poisson(exposure * np.exp(x @ coef - 1.0)).astype(float)
    params = {"rating": {"coef": np.array([0.1, 0.05, -0.1]), "base": np.array(-0.8)}}
    return params, {"x": x, "exposure": exposure, "claims": claims}


def _mean(params, inputs):
    eta = inputs["x"] @ params["rating"]["coef"] + params["rating"]["base"]
    return inputs["exposure"] * np.exp(eta)


def forward(params, inputs):
    mu = _mean(params, inputs)
    coef = params["rating"]["coef"]
    return float(np.sum(mu - inputs["claims"] * np.log(mu)) + 0.5 * RIDGE * coef @ coef)


def backward(params, inputs):
    mu = _mean(params, inputs)
    r = mu - inputs["claims"]
    coef = params["rating"]["coef"]
    return {"rating": {"coef": inputs["x"].T @ r + RIDGE * coef, "base": np.array(r.sum())}}


def hessian(params, inputs):
    mu = _mean(params, inputs)
    x = inputs["x"]
    h = np.empty((FACTORS + 1, FACTORS + 1))
    h[:FACTORS, :FACTORS] = x.T @ (mu[:, None] * x) + RIDGE * np.eye(FACTORS)
    h[:FACTORS, FACTORS] = h[FACTORS, :FACTORS] = x.T @ mu
    h[FACTORS, FACTORS] = mu.sum()
    return h
