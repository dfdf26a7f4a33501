"""Wide-step windows (engine/wide_steps.py windowed, plain_windowed) on rows whose steps do not
ascend: where the loss overflows at a wide step, the pair's step shrinks 16-fold
(probe.TensorProbe.pairs), and the rows past it repeat smaller steps. A window across them
is no window of the model (steps s, 2s, 4s, 8s), and its widest step is not its last.

Reference: the table of derivatives, d/dx ln cosh x = tanh x (any calculus table, e.g.
Abramowitz & Stegun 4.5.8 with 4.1.16's chain rule), evaluated by mpmath at the float16 values
the code computes with.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from gradprobe.api import probe

torch = pytest.importorskip("torch")


def _sensor_drift(n: int = 300, seed: int = 2):
    """Sensor drift: a log-cosh penalty per sensor's offset w, weighted by its gain c, all in
    float16 (the forward asserts it: no wider run). cosh overflows float16 past about 11, so
    the widest steps of the wide estimate shrink."""
    rng = np.random.default_rng(seed)
    w = torch.tensor(rng.normal(size=n), dtype=torch.float16)
    c = torch.tensor(rng.normal(size=n), dtype=torch.float16)

    def forward(params, inputs):
        assert params["w"].dtype == torch.float16
        return (inputs["c"] * torch.log(torch.cosh(params["w"]))).sum()

    def backward(params, inputs):
        assert params["w"].dtype == torch.float16
        return {"w": (inputs["c"] * torch.tanh(params["w"])).to(torch.float16)}

    return forward, backward, w, c


def test_windows_past_a_shrunk_step_are_no_false_alarm():
    forward, backward, w, c = _sensor_drift()
    report = probe(forward, backward, {"w": w}, {"c": c})
    t = report.tensors[0]
    assert t.status.value != "fail", [d for d in t.details if d.status.value == "fail"][:3]
    # Every checked coordinate with a finite bound (the reported ones and those passed) covers
    # the table's derivative at the float16 values (c tanh w, by mpmath), within the float16
    # rounding of the product.
    checked = t.coordinates
    bound = np.asarray(checked.noise) * np.asarray(checked.scale)
    bounded = np.flatnonzero(np.isfinite(bound))
    assert bounded.size
    for i in bounded.tolist():
        k = int(checked.flat[i])
        exact = float(mpmath.mpf(float(c[k])) * mpmath.tanh(mpmath.mpf(float(w[k]))))
        room = 4 * 2.0**-11 * max(abs(exact), 2.0**-14)
        assert abs(float(checked.numeric[i]) - exact) <= bound[i] + room, (k, checked.numeric[i], exact, bound[i])


def test_a_plain_window_bounds_what_its_smaller_step_shows():
    """A window whose smaller change (D2 - D1) exceeds what D3 - D2 predicts for c s**2, within
    the rounding room the shrink test grants: the bound holds that change too. Under the model
    D(s) = f' + c s**2, D2 - f' = c s2**2 = (D2 - D1) s2**2 / (s2**2 - s1**2) (common practice:
    the leading term of the central difference's error is f''' s**2 / 6)."""
    from gradprobe.engine.wide_steps import plain_windowed

    s = np.array([[0.5], [1.0], [2.0]])
    d = np.array([[0.0166], [0.0083], [0.00415]])  # a kink beyond 0.32: D = f' - 0.223 c / s
    e = np.array([[1.95e-3], [9.8e-4], [4.9e-4]])
    zero = np.zeros_like(d)
    est = plain_windowed(d, s, e, zero, zero + 1e-3, zero, np.array([4.0]))
    shown = (abs(d[0, 0] - d[1, 0]) - e[0, 0] - e[1, 0]) * s[1, 0] ** 2 / (s[1, 0] ** 2 - s[0, 0] ** 2)
    assert not np.isfinite(est.error[0]) or est.error[0] >= shown


def test_a_float32_abs_term_with_its_kink_within_the_wide_steps_is_no_false_alarm():
    """float32only-2805 (adversarial generator, loss cast to float32, |a (p - k)| terms, one
    0.32 from the point along its coordinate, the loss ~3e3 so its rounding needs steps
    of about 1): a correct element was failed on a window at steps 0.5, 1, 2 across that kink
    (its central quotients fall like 1/s there). Reference: mpmath, through the generator's
    judge."""
    from adversarial import judge

    o = judge("float32only", 2805)
    assert o["correct"] and o["unverified"] is None and o["crash"] is None
    assert not o["false_alarm"], o["status"]
