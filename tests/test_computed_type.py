"""The type a forward computes in, found from how its loss responds to moves of its params:
float32-only code (every array float32, the loss cast with np.float32) is float32 even where
abs/relu kinks lie within the moves or the loss is locally flat, and is judged on float32's
unit roundoff (2**-24), not bfloat16's (2**-8) or float16's (2**-11) (the three unit roundoffs:
IEEE 754 binary32 and binary16, and bfloat16's 8 significant bits; common practice).

Reference: the adversarial generator's cases (tests/adversarial) are float32-only by
construction (every param and input is float32 and forward returns np.float32 of float32
arithmetic) and their gradients are checked by its judge against mpmath at 50 digits; the
hand-written targets below are float32 numpy code by inspection.
"""

from __future__ import annotations

import numpy as np
import pytest

import gradprobe

# Kinks crossed by moves of 2**-4 made the loss's changes look like a coarser grid's:
# 133 (abs and softplus terms, curved across the moves) and 290 (an exp term with an offset 100
# times its param, so float32 itself drops a move of 2**-18) were taken as bfloat16; 43259 (every
# relu unit off at the point: the loss is exactly 0 nearby) as bfloat16; 43297 (the same, with a
# kink 2**-10 away on one side) as float16.
KINKED_SEEDS = [133, 290, 43259, 43297]


def _report(seed: int):
    from adversarial import make_case
    from adversarial.case import load

    case = make_case("float32only", seed)
    ns = load(case)
    params, inputs = ns["setup"]()
    return gradprobe.probe(ns["forward"], ns["backward"], params, inputs)


@pytest.mark.parametrize("seed", KINKED_SEEDS)
def test_float32_only_code_with_kinks_is_found_to_compute_in_float32(seed):
    from adversarial import judge

    o = judge("float32only", seed)
    assert o["correct"] and o["dtype"] == "float32" and o["unverified"] is None, o
    assert not o["false_alarm"], o["status"]
    report = _report(seed)
    assert report.compute_dtype == "float32", report.notes
    assert not any("bfloat16" in n or "float16" in n for n in report.notes), report.notes


def _shop_relu(claimed: float = 1.0):
    """Demand shortfall priced per shop: every shop's shortfall is 0 at the point (relu off), a
    kink 2**-10 of the price above it on one shop; float32 throughout."""
    price = np.array([0.5, 0.75, 1.25, 2.0], np.float32)
    floor = (price * np.float32(1 + 2.0**-10)).astype(np.float32)
    floor[1:] = price[1:] * np.float32(1.5)
    weight = np.array([3.0, 1.5, 2.0, 0.5], np.float32)

    def forward(params, inputs):
        p = np.asarray(params["price"], np.float32)
        return np.float32(np.sum(weight * np.maximum(p - floor, np.float32(0))))

    def backward(params, inputs):
        p = np.asarray(params["price"], np.float32)
        return {"price": (claimed * weight * (p > floor)).astype(np.float32)}

    return forward, backward, {"price": price.copy()}


def test_a_float32_loss_flat_at_the_point_is_not_taken_as_sixteen_bits():
    """The loss is exactly 0 around the point and only one move of 2**-4 reaches a kink: no
    grid of a coarser type is seen, so the code is judged as the float32 it is (its gradient,
    0 at the point, is right: d/dp max(p - floor, 0) = 0 for p < floor)."""
    forward, backward, params = _shop_relu()
    report = gradprobe.probe(forward, backward, params, {})
    assert report.compute_dtype == "float32", report.notes
    assert report.ok


def _crop_exp():
    """Crop yield with an exponential response whose offset is about 100 times the param: float32 rounds
    a move of 2**-18 of the param away in a * (p - k), yet float32 resolves 2**-16."""
    k = np.array([-25.0, -40.0, -50.0], np.float32)
    a = np.array([0.4, 0.25, 0.2], np.float32)
    w = np.array([1.5, 0.7, 2.0], np.float32)
    p0 = np.array([0.25, 0.375, 0.5], np.float32)

    def forward(params, inputs):
        p = np.asarray(params["p"], np.float32)
        return np.float32(np.sum(w * np.exp(a * (p - k))))

    def backward(params, inputs):
        p = np.asarray(params["p"], np.float32)
        return {"p": (w * a * np.exp(a * (p - k))).astype(np.float32)}

    return forward, backward, {"p": p0.copy()}


def test_float32_rounding_a_move_away_in_an_offset_is_not_taken_as_sixteen_bits():
    forward, backward, params = _crop_exp()
    report = gradprobe.probe(forward, backward, params, {})
    assert report.compute_dtype == "float32", report.notes


def test_the_crop_target_is_float32_code_that_drops_the_tiny_move():
    """The premise of the test above, independent of gradprobe: the loss is bitwise unchanged at
    a move of 2**-18 of every param rounded to bfloat16, and changes at 2**-16."""
    ml_dtypes = pytest.importorskip("ml_dtypes")
    forward, _, params = _crop_exp()
    p = params["p"].astype(ml_dtypes.bfloat16).astype(np.float64)
    at = {m: forward({"p": (p * (1 + m)).astype(np.float32)}, {}) for m in (0.0, 2.0**-18, -2.0**-18, 2.0**-16)}
    assert at[2.0**-18] == at[0.0] == at[-2.0**-18]
    assert at[2.0**-16] != at[0.0]


# float16 kernels inside float64 arrays whose loss, scaled along the params, bends between moves
# of 2**-7 and 2**-4: the float64 look had already seen the loss unchanged at 2**-12 (wider code
# would see that), yet the slope was asked to show at 2**-18, so no 16-bit type was found and
# the code was judged as float64: 43023 (correct) failed, 43035's dropped term passed, 88's
# wrong piece was undecided.
FLOAT16_IN_FLOAT64_SEEDS = [43023, 43035, 88]


@pytest.mark.parametrize("seed", FLOAT16_IN_FLOAT64_SEEDS)
def test_a_float16_kernel_in_float64_arrays_is_found(seed):
    from adversarial import judge, make_case
    from adversarial.case import load

    case = make_case("inside16", seed)
    assert case.dtype == "float16"
    ns = load(case)
    params, inputs = ns["setup"]()
    report = gradprobe.probe(ns["forward"], ns["backward"], params, inputs)
    # float16, or bfloat16 where the two could not be told apart (the coarser judges leniently)
    assert report.compute_dtype in ("float16", "bfloat16"), report.notes
    o = judge("inside16", seed)
    assert o["unverified"] is None and not o["false_alarm"], o["status"]
    assert o["correct"] or o["found"], (o["status"], o["expect"])


# An odd loss of params placed symmetrically about 0 (np.linspace(-1, 1, n)) cancels along the
# even move of 2**-30 (2**-36 then) in float64 as well, and its tiny nonzero value (linspace's rounding) made the
# move's expected change look resolvable: float64 code was taken as float32 and judged at 4.9e-4,
# so a gradient 1e-4 off passed. Derivatives: d/dx sin x = cos x (Abramowitz & Stegun 4.3.105),
# d/dx tanh x = sech^2 x = 1 - tanh^2 x (A&S 4.5.71 family).
SYMMETRIC = {
    "sin": (np.sin, np.cos),
    "tanh": (np.tanh, lambda w: 1 - np.tanh(w) ** 2),
}


@pytest.mark.parametrize("n", [4, 5, 8])
@pytest.mark.parametrize("name", sorted(SYMMETRIC))
def test_float64_odd_loss_symmetric_about_zero_stays_float64(name, n):
    fun, slope = SYMMETRIC[name]
    w = np.linspace(-1.0, 1.0, n)
    forward = lambda p, i: float(np.sum(fun(p["w"])))  # noqa: E731
    right = gradprobe.probe(forward, lambda p, i: {"w": slope(p["w"])}, {"w": w}, {})
    assert right.ok and right.compute_dtype == "float64" and right.threshold == 1e-6
    wrong = gradprobe.probe(forward, lambda p, i: {"w": slope(p["w"]) * (1 + 1e-4)}, {"w": w}, {})
    assert wrong.tensor("w").status == "fail"


# The same cancellation in float32 code fooled the 16-bit look (its moves are even too): float32
# arctan of params symmetric about 0 was taken as bfloat16 and judged at 0.12, so a gradient 2%
# off passed. d/dx arctan x = 1 / (1 + x^2) (Abramowitz & Stegun section 4.4, from memory).
@pytest.mark.parametrize("n, half_width", [(7, 1.0), (10, 2.5)])
def test_float32_odd_loss_symmetric_about_zero_is_not_sixteen_bits(n, half_width):
    w = np.linspace(-half_width, half_width, n).astype(np.float32)
    forward = lambda p, i: np.float32(np.sum(np.arctan(p["w"])))  # noqa: E731

    def slope(p, factor):
        return {"w": (factor / (1 + p["w"] ** 2)).astype(np.float32)}

    right = gradprobe.probe(forward, lambda p, i: slope(p, 1.0), {"w": w}, {})
    assert right.ok and right.compute_dtype == "float32"
    wrong = gradprobe.probe(forward, lambda p, i: slope(p, 1.02), {"w": w}, {})
    assert wrong.tensor("w").status == "fail"


def test_bfloat16_inside_float32_arrays_with_a_small_slope_along_the_moves_is_found():
    """inside16-1200851: bfloat16 arithmetic inside float32 arrays, whose loss (14.7) changes
    along the even moves at first order by 0.031 per 2**-4: scaled to 2**-18 that is under two
    units of float32's, no evidence, and the code was judged as float32 (a coordinate failed on
    the bfloat16 staircase, 0 +- 9e-4 against -0.498). Moves of 2**-16 leave the loss unchanged
    too, where float32 code would move it by eight units: bfloat16."""
    from adversarial import judge, make_case
    from adversarial.case import load

    case = make_case("inside16", 1200851)
    assert case.dtype == "bfloat16" and case.flavor == "inside32"
    ns = load(case)
    params, inputs = ns["setup"]()
    report = gradprobe.probe(ns["forward"], ns["backward"], params, inputs)
    assert report.compute_dtype == "bfloat16", report.notes
    o = judge("inside16", 1200851)
    assert not o["false_alarm"], o["status"]
