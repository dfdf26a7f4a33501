"""The cost benchmark's targets, and the plain central-difference loop they are compared with.

``regression`` is a tanh network forecasting crop yields from field measurements: 10 inputs,
48 tanh units, 16 outputs (1,312 params), a mean squared error over 4,000 plots x 16 outputs
(64,000 values; about 1 ms per forward). ``small`` is the same network on 4 plots (about
10 us). ``dense`` is a well-conditioned dense tanh net for ``--method richardson``: loss of
size about 1, gradients of size about 0.1.

``python bench/cost_cases.py NAME`` runs, in a fresh process, a plain loop of central
differences over every coordinate of NAME's params (step 1e-6 * max(1, |x|)), as a user
would write it by hand.
"""

from __future__ import annotations

import sys

import numpy as np


class Regression:
    """A tanh network forecasting crop yields; ``exact`` is its closed-form gradient."""

    def __init__(self, plots: int, inputs: int = 10, hidden: int = 48, outputs: int = 16,
                 seed: int = 3, weight: float = 1.0, target: float = 1.0) -> None:
        self.plots, self.n_in, self.n_hidden, self.n_out = plots, inputs, hidden, outputs
        self.seed, self.weight, self.target = seed, weight, target

    def setup(self):
        rng = np.random.default_rng(self.seed)
        params = {
            "hidden": {"W": self.weight * rng.normal(size=(self.n_in, self.n_hidden)) / np.sqrt(self.n_in),
                       "b": 0.1 * rng.normal(size=self.n_hidden)},
            "yield": {"W": self.weight * rng.normal(size=(self.n_hidden, self.n_out)) / np.sqrt(self.n_hidden),
                      "b": 0.1 * rng.normal(size=self.n_out)},
        }
        inputs = {"field": rng.normal(size=(self.plots, self.n_in)),
                  "harvest": self.target * rng.normal(size=(self.plots, self.n_out))}
        return params, inputs

    def forward(self, params, inputs):
        h = np.tanh(inputs["field"] @ params["hidden"]["W"] + params["hidden"]["b"])
        out = h @ params["yield"]["W"] + params["yield"]["b"]
        return float(np.mean((out - inputs["harvest"]) ** 2))

    def backward(self, params, inputs):
        h = np.tanh(inputs["field"] @ params["hidden"]["W"] + params["hidden"]["b"])
        out = h @ params["yield"]["W"] + params["yield"]["b"]
        r = 2.0 * (out - inputs["harvest"]) / out.size
        dz = (r @ params["yield"]["W"].T) * (1.0 - h**2)
        return {"hidden": {"W": inputs["field"].T @ dz, "b": dz.sum(axis=0)},
                "yield": {"W": h.T @ r, "b": r.sum(axis=0)}}


    def reference(self, params, inputs, digits: int = 40):
        """The same closed-form gradient (the chain rule through tanh, d tanh z = 1 - tanh(z)**2:
        Abramowitz & Stegun 4.5.82) evaluated in mpmath at ``digits`` digits, rounded to
        float64 at the end: an exact reference for the numeric derivatives."""
        import mpmath

        with mpmath.workdps(digits):
            mat = lambda a: mpmath.matrix(np.atleast_2d(a).tolist())  # noqa: E731
            field, harvest = mat(inputs["field"]), mat(inputs["harvest"])
            w1, w2 = mat(params["hidden"]["W"]), mat(params["yield"]["W"])
            b1, b2 = params["hidden"]["b"].tolist(), params["yield"]["b"].tolist()
            z = field * w1
            h = mpmath.matrix(z.rows, z.cols)
            for n in range(z.rows):
                for j in range(z.cols):
                    h[n, j] = mpmath.tanh(z[n, j] + b1[j])
            out = h * w2
            r = mpmath.matrix(out.rows, out.cols)
            for n in range(out.rows):
                for k in range(out.cols):
                    r[n, k] = 2 * (out[n, k] + b2[k] - harvest[n, k]) / (out.rows * out.cols)
            dz = r * w2.T
            for n in range(dz.rows):
                for j in range(dz.cols):
                    dz[n, j] *= 1 - h[n, j] ** 2
            as_array = lambda m: np.array(m.tolist(), dtype=float)  # noqa: E731
            sums = lambda m: np.array([float(mpmath.fsum(m[n, j] for n in range(m.rows)))  # noqa: E731
                                       for j in range(m.cols)])
            return {"hidden": {"W": as_array(field.T * dz), "b": sums(dz)},
                    "yield": {"W": as_array(h.T * r), "b": sums(r)}}


def regression():
    """1,312 params, a mean over 64,000 values (about 1 ms per forward)."""
    return Regression(4000)


def small():
    """The same network on 4 plots (about 10 us per forward)."""
    return Regression(4)


def dense():
    """A dense tanh net with a loss of about 1 and gradients of about 0.1 (for richardson)."""
    return Regression(64, inputs=8, hidden=24, outputs=4, seed=5, weight=0.6, target=1.0)


CASES = {"regression": regression, "small": small, "dense": dense}


def plain_loop(case) -> np.ndarray:
    """Central differences over every coordinate, step 1e-6 * max(1, |x|)."""
    params, inputs = case.setup()
    flat = {}

    def walk(tree, prefix=""):
        for key, value in tree.items():
            if isinstance(value, dict):
                walk(value, f"{prefix}{key}.")
            else:
                flat[f"{prefix}{key}"] = value

    walk(params)
    out = []
    case.forward(params, inputs)
    for array in flat.values():
        view = array.reshape(-1)
        for k in range(view.size):
            old = view[k]
            h = 1e-6 * max(1.0, abs(old))
            view[k] = old + h
            up = case.forward(params, inputs)
            view[k] = old - h
            down = case.forward(params, inputs)
            view[k] = old
            out.append((up - down) / (2 * h))
    return np.array(out)


if __name__ == "__main__":
    plain_loop(CASES[sys.argv[1]]())
