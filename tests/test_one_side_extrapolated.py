"""float32 code judged on its own arithmetic, a Huber corner just beside the point: the other
side's one-sided quotients, extrapolated on wide steps (gradprobe/engine/one_side.py,
``_side_extrapolated``).

adversarial float32only-900030: along p1[1, 1] the Huber residual sits at u = -0.99862, its
corner 1.4e-4 away on the left. Every central window at the wide steps float32 rounding needs
crosses the corner, and the left side beyond it is a straight line; the right side is the
quadratic piece out to 0.2, its quotients f' + c1 s (rows 2.4e-4 to 0.25 all on that line). The
plain one-sided estimate Q(s2) keeps c1 s2 in its bound (1.4e-4 against a tolerance of 1.1e-5)
and the tensor was inconclusive; two quotients extrapolated to the step 0 give f' to 1e-7.
"""

from __future__ import annotations

import mpmath
import numpy as np

from gradprobe import probe

# Scenario: a greenhouse's heating plan. The season's penalty is a Huber loss of each zone's
# temperature error, gain * (setting - target), priced at PRICE * WEIGHT; the setting of one
# zone leaves its error at -0.9986, just inside the corner at -1 (its other zones' penalties,
# which this setting does not move, set the loss's size and rounding). The reference: d/du of
# u**2 / 2 is u (any table of derivatives, from memory), and mpmath's differentiation.
O, W, A, K = 0.0262, 0.0876, 9.66, 1.1  # price, weight, gain, target


def _huber(u):
    return np.where(np.abs(u) <= 1, 0.5 * u * u, np.abs(u) - 0.5)


def _target(p: float, factor: float = 1.0):
    params = {"p": np.array([p], dtype=np.float32)}
    inputs = {"c": np.array([0.9, -1.3, 0.6], dtype=np.float32)}  # the other zones' errors

    def forward(params, inputs):
        x = np.asarray(params["p"], dtype=np.float32)
        u = np.float32(A) * (x - np.float32(K))
        rest = np.sum(np.abs(inputs["c"]) * np.float32(-0.1))
        return np.float32(np.float32(O) * np.sum(np.float32(W) * _huber(u)) + rest)

    def backward(params, inputs):
        x = np.asarray(params["p"], dtype=np.float32)
        u = np.float32(A) * (x - np.float32(K))
        return {"p": (factor * np.float32(O) * np.float32(W) * np.clip(u, -1, 1) * np.float32(A)).astype(np.float32)}

    return forward, backward, params, inputs


def _reference(p: float) -> float:
    """mpmath's derivative of the same loss on the float32 values (the quadratic piece)."""
    mpmath.mp.dps = 40
    o, w, a, k = (mpmath.mpf(float(np.float32(v))) for v in (O, W, A, K))
    return float(mpmath.diff(lambda x: o * w * 0.5 * (a * (x - k)) ** 2, mpmath.mpf(float(np.float32(p)))))


# u = A (p - K) = -0.9986: the corner at u = -1 lies 1.4e-4 to the left of p.
P = float(K - 0.9986 / A)


def _status(report) -> str:
    return str(getattr(report.tensor("p").status, "value", report.tensor("p").status))


def test_the_closed_form_is_the_quadratic_piece():
    forward, backward, params, inputs = _target(P)
    analytic = float(backward(params, inputs)["p"][0])
    assert abs(analytic - _reference(P)) <= 1e-6 * abs(_reference(P))


def test_a_huber_corner_beside_the_point_passes_on_the_quadratic_side():
    forward, backward, params, inputs = _target(P)
    report = probe(forward, backward, params, inputs)
    assert _status(report) == "pass", report.tensor("p").inconclusive_reason
    assert np.array_equal(params["p"], np.array([P], dtype=np.float32))  # the caller's array unchanged


def test_a_gradient_half_a_percent_off_there_does_not_pass():
    forward, backward, params, inputs = _target(P, factor=1.005)
    report = probe(forward, backward, params, inputs)
    assert _status(report) in ("fail", "inconclusive")


def test_float32only_900030_as_first_found_is_decided():
    from adversarial import judged_cleanly

    o = judged_cleanly("float32only", 900030)
    assert not o["false_alarm"], (o["status"], o["expect"])
    assert o["status"]["p1"] == "pass", o["status"]
