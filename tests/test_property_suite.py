"""Seeded random compositions of ops: a fast sample of the property suite (the large run is
``bench/property_suite.py``).

Each case is a small network drawn from a seed (see ``composer``): dense layers, broadcast
biases and scales, reductions, softmax, fan-out, products and maxima of branches; ReLU, leaky
ReLU, abs, clip, tanh, softplus; squared, absolute, Huber and cross-entropy losses; float64 and
float32; scalar losses and array outputs; params scaled 1e-4..1e3 and losses 1e-6..1e6; points
exactly at, 1e-9/1e-7 from, or away from kinks. Its backward is the reverse sweep of per-op
vector-Jacobian products, so it is correct by construction, and ``test_backward_matches_mpmath``
confirms that against mpmath's high-precision differentiation. The bug categories plant one
bug per network copy. What each report must say is in ``composer.cases``.

Seeds are plain integers fed to numpy generators, parametrised with pytest rather than drawn by
hypothesis: a failing case is named by its test id (``bug-sign-3``), reruns alone with ``-k``,
and is the very case the bench counts under the same seed; shrinking a seed would not make a
network simpler.

Facts of the trade used here (common practice): the one-sided derivative conventions at kinks
(ReLU'(0) = 0, |x|'(0) = 0, ties of a max go to the first argument) give valid subgradients; a
Huber loss is continuously differentiable at its switch point. mp.dps = 40 and mpmath.diff's
default step resolve a float64 derivative to far below 1e-10 relative (from memory of mpmath's
documentation: the step is chosen from the working precision).
"""

from __future__ import annotations

import numpy as np
import pytest
from composer.cases import BUGS, CATEGORIES, make_case, problems
from composer.large import CI_SIZES, biggest_weight, mlp, one_element_bug
from composer.reference import kinked_tensors, nearest_kink, reference_gradient

import gradprobe
from gradprobe import render_text

SEEDS = range(6)


def _message(case, report, found) -> str:
    return "\n".join([case.describe(), *(f"  - {p}" for p in found), render_text(report)])


def _probe(net, **options):
    return gradprobe.probe(net.forward, net.backward, net.params, net.inputs, **options)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("category", CATEGORIES)
def test_category(category, seed):
    case = make_case(category, seed)
    report = _probe(case.net)
    found = problems(report, case)
    assert not found, _message(case, report, found)


# Cases the large run once got wrong, kept as they were found (category-seed): bugs hidden
# where kinks coincide (found by the second look off the point), a max tied in every row whose
# sides are too noisy to tell apart, kinks within steps grown to beat rounding noise, float32
# losses at the rounding level of their own terms (a zero read off an unchanged loss), a
# backward whose own rounding is above the threshold, a bug reaching a tensor only off the point,
# a kink closer than the smallest step of the chain judged on the rounding measured along it,
# a float32 value off the sides of a kink its rounding reaches excused as that rounding, and a
# kink 1e-9 away whose jump stays in the gap of a chain where curvature's share halves.
FOUND_BY_THE_BENCH = ["bug-factor-5023", "bug-accumulation-31", "bug-accumulation-33",
                      "bug-derivative-11", "bug-transpose-5019", "kink-at-23", "kink-near-5013",
                      "f32-scalar-22", "f32-scalar-39", "kink-at-20069", "bug-derivative-20044",
                      "kink-near-5055", "bug-sign-61003", "bug-transpose-61022"]


@pytest.mark.parametrize("name", FOUND_BY_THE_BENCH)
def test_case_found_by_the_bench(name):
    """What they got wrong was the exit code: no false alarm, no bug missed or not located."""
    category, seed = name.rsplit("-", 1)
    case = make_case(category, int(seed))
    report = _probe(case.net)
    found = [p for p in problems(report, case) if p.startswith(("false alarm", "bug "))]
    assert not found, _message(case, report, found)


@pytest.mark.parametrize("name", ["f32-scalar-6", "f32-scalar-50"])
def test_float32_on_a_kink_its_float64_run_misses_is_decided(name):
    """float32 rounding puts the code exactly on a kink that its float64 run misses by less
    than float32 resolves: a kink, not inconclusive (these once were, for float32 noise)."""
    category, seed = name.rsplit("-", 1)
    case = make_case(category, int(seed))
    report = _probe(case.net)
    assert not [t.name for t in report.tensors if t.status in ("inconclusive", "fail")], \
        _message(case, report, [])


def _grad_output(net):
    if net.scalar:
        return None
    return np.random.default_rng(5).normal(size=np.shape(net.forward(net.params, net.inputs)))


def _wide(tree):
    return {k: (np.asarray(v, dtype=np.longdouble) if np.asarray(v).dtype.kind == "f" else v)
            for k, v in tree.items()}


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("category", ["f64-scalar", "f64-array"])
def test_backward_matches_mpmath(category, seed):
    """The by-construction backward against mpmath.diff of the same ops at 40 digits, at points
    at least 1e-6 (absolute, in each kinked op's argument) from any kink.

    The VJPs run once in extended precision (numpy's longdouble, 64-bit mantissa on x86-64), which
    must agree with mpmath to 1e-10 relative per coordinate plus 1e-15 of the target's largest
    gradient entry (the extended run's rounding of sums of large terms); and once in float64,
    which must agree to 1e-10 relative plus 1e-13 of the largest entry plus four times its own
    measured rounding (its distance from the extended run)."""
    case = next(c for c in (make_case(category, s) for s in range(10 * seed, 10 * seed + 10))
                if nearest_kink(c.net) > 1e-6)  # the first of ten seeds away from kinks
    net = case.net
    go = _grad_output(net)
    ours = net.backward(net.params, net.inputs, go)
    wide = net.backward(_wide(net.params), _wide(net.inputs), None if go is None else np.asarray(go, dtype=np.longdouble))
    ref = reference_gradient(net, go)
    top = max([float(np.max(np.abs(r))) for r in ref.values()] + [np.finfo(np.float64).tiny])
    for name, r in ref.items():
        w = np.asarray(wide[name], dtype=np.longdouble)
        excess = np.abs(w - r) - 1e-10 * np.abs(r) - 1e-15 * top
        assert float(np.max(excess)) <= 0, (name, "extended", case.describe(), w, r)
        rounding = np.abs(ours[name] - w).astype(np.float64)
        excess = np.abs(ours[name] - r) - 1e-10 * np.abs(r) - 1e-13 * top - 4 * rounding
        assert float(np.max(excess)) <= 0, (name, "float64", case.describe(), ours[name], r)


def test_planted_bugs_are_wrong_against_mpmath():
    """The planted bugs really change the gradient: against the mpmath reference the buggy
    backward of every tensor that must fail is off by far more than rounding."""
    for category in BUGS:
        case = next(c for c in (make_case(category, s) for s in range(40))
                    if c.net.dtype == np.float64 and not c.net.kink_tensors)
        go = _grad_output(case.net)
        ref = reference_gradient(case.net, go)
        bad = case.net.backward(case.net.params, case.net.inputs, go)
        for name in case.required:
            scale = float(np.max(np.abs(ref[name])))
            assert float(np.max(np.abs(bad[name] - ref[name]))) > 1e-4 * scale, case.describe()


@pytest.mark.parametrize("seed", range(6))
def test_kink_labels_match_one_sided_slopes(seed):
    """The tensors labelled "exactly at a kink" are the only ones whose mpmath one-sided
    difference quotients differ (``composer.reference.kinked_tensors``); the near-kink and
    corner placements have equal one-sided slopes."""
    for category in ("kink-at", "kink-near", "huber-corner"):
        net = make_case(category, seed).net
        kinked = kinked_tensors(net, _grad_output(net))
        assert kinked <= set(net.kink_tensors), (category, seed, kinked, net.description)
        if category != "kink-at":
            assert not kinked, (category, seed, kinked, net.description)


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("activation", ["relu", "tanh"])
@pytest.mark.parametrize("factor", [None, 1.01, 0.0])
def test_large_network_sampled_plan(activation, factor, seed):
    """A ~31k-param MLP (above the default full-sweep total of 20,000 coordinates, so sampling
    and random directions): correct passes everywhere; one wrong element of the biggest weight
    is found and located, in the ReLU net as in its tanh twin."""
    net = mlp(seed, CI_SIZES, activation)
    if factor is not None:
        net = one_element_bug(net, factor, seed)
    report = _probe(net)
    pre = [v for k, v in _pre_activations(net).items()]
    assert all(np.all(p != 0) for p in pre), "no coordinate is exactly at a kink"
    text = f"{net.description}; bug {net.bug}\n{render_text(report)}"
    if factor is None:
        assert [t.name for t in report.tensors if t.status != "pass"] == [], text
        return
    wrong = report.tensor(biggest_weight(net))
    assert wrong.status == "fail", text
    assert net.bug.index in wrong.bad_indices, text
    assert [t.name for t in report.tensors if t.status == "fail"] == [wrong.name], text


def _pre_activations(net):
    from composer.backend import NUMPY
    from composer.graph import evaluate

    values = evaluate(net, NUMPY, net.params, net.inputs)
    return {k: v for k, v in values.items() if k.startswith("pre")}

