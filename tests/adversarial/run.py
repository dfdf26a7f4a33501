"""Run one case through gradprobe and judge the verdicts against the mpmath reference.

Expected verdicts, decided honestly per tensor:

- the generator is verified first: the correct version's gradient must agree with mpmath's to
  the dtype's rounding (32 unit roundoffs of the gradient's scale plus 8 times the spread that
  a one-unit-roundoff jiggle of every array causes); a case that does not is ``unverified``
  and carries no expectation;
- correct target: ``pass``/``kink`` expected; ``fail`` is a false alarm; ``inconclusive`` counted;
- buggy target: a tensor must fail when mpmath shows a coordinate whose relative error (the
  protocol's: ``|a - g| / max(|a|, |g|, 1e-3 rms(g))``) exceeds 1.5x the report's threshold AND
  the bug is resolvable in the dtype (its effect over the coordinate's smooth radius is at
  least 100 unit roundoffs of the loss's summands); ``pass``/``kink`` there is a miss, and a
  one-element bug must be located (in ``bad_indices`` or as ``worst_index``); a tensor whose
  error is below a third of the threshold everywhere must not fail (else a false alarm), but
  for the planted bug's own tensor whose every failure was found at a point moved off a kink
  (gradprobe's second look): the backward is wrong there, only not at the point itself (a
  dropped term or a chain factor where a ReLU is off), so that is a finding, not an alarm; a
  tensor whose gradient the buggy backward returns bit for bit as the correct one does is
  judged as in the correct target (the bug did not reach it: an error there is the user's own
  rounding, which the correct twin expects quiet);
- a crash is any exception from gradprobe on these valid targets (exit 2 or 3 on the CLI);
- ``resolves``: a correct target whose every coordinate would resolve an error of the
  threshold's size by the same rule (where not, an inconclusive verdict can be the dtype's
  arithmetic at its limit);
- ``ratios``: for a correct target with no wider run left inconclusive, per undecided
  coordinate, how far its measured rounding lets an error of the threshold's size show
  (:mod:`.rounding`: below 1 no step can show it); ``best_steps``: per such coordinate, the
  best single step's truncation or rounding (against mpmath) over the tolerance (above 1 no
  single step resolves an error of the threshold's size).
"""

from __future__ import annotations

import traceback
import warnings
from pathlib import Path

import numpy as np

import gradprobe
from gradprobe.common.errors import ProbeError

from .bugs import make_case
from .case import Case, load
from .reference import FULL, reference
from .rounding import best_steps, ratios

SUBSET = 48  # elements of a big tensor the reference evaluates (plus a bug's element)


def unit(dtype: str) -> float:
    return float(np.finfo(np.dtype(dtype)).eps) / 2


def _subset(case: Case, rng: np.random.Generator) -> dict[str, np.ndarray]:
    out = {}
    for name, p in case.params.items():
        if p.size > FULL:
            idx = rng.choice(p.size, SUBSET, replace=False)
            if case.bug is not None and case.bug.index is not None and case.bug.tensor == name:
                idx = np.append(idx, np.ravel_multi_index(case.bug.index, p.shape))
            out[name] = np.unique(idx)
    return out


def _gradients(ns: dict, params, inputs) -> dict[str, np.ndarray]:
    g = ns["backward"](params, inputs)
    return {n: np.asarray(v, dtype=np.float64) for n, v in g.items()}


def _jiggled(case: Case, ns: dict, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The correct gradient's spread when every array moves by about one ulp."""
    u = unit(case.dtype)
    params, inputs = ns["setup"]()
    base = _gradients(ns, params, inputs)
    spread = {n: np.zeros_like(g) for n, g in base.items()}
    for _ in range(4):  # each array element moves by about one ulp, up or down
        def move(a):
            a = np.asarray(a)
            return (a.astype(np.float64) * (1 + 2 * u * rng.choice([-1.0, 1.0], a.shape))).astype(a.dtype)
        with np.errstate(all="ignore"):
            g = _gradients(ns, {n: move(a) for n, a in params.items()}, {n: move(a) for n, a in inputs.items()})
        for n in spread:
            spread[n] = np.maximum(spread[n], np.abs(g[n] - base[n]))
    return spread


def _flat(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return np.asarray(a, dtype=np.float64).reshape(-1)[idx]


def _floors(ref) -> dict[str, float]:
    rms = {n: float(np.sqrt(np.mean(_flat(g, ref.evaluated[n]) ** 2))) if ref.evaluated[n].size else 0.0
           for n, g in ref.grads.items()}
    top = max(rms.values(), default=0.0)
    return {n: max(1e-3 * r, 1e-4 * top, 1e-300) for n, r in rms.items()}


def verify(case: Case, ref, rng) -> list[str]:
    """Disagreements of the correct version's gradient with mpmath beyond rounding."""
    ns = load(case.with_bug(None))
    with np.errstate(all="ignore"):
        grads = _gradients(ns, *ns["setup"]())
    spread = _jiggled(case.with_bug(None), ns, rng)
    floors, u, out = _floors(ref), unit(case.dtype), []
    for n, g in ref.grads.items():
        idx = ref.evaluated[n]
        true, got, jig = _flat(g, idx), _flat(grads[n], idx), _flat(spread[n], idx)
        size = _flat(ref.mags[n], idx)
        tol = 32 * u * (np.abs(true) * ref.condition + size + floors[n]) + 8 * jig
        bad = np.abs(got - true) > tol
        if bad.any() or not np.all(np.isfinite(got)):
            i = int(np.argmax(np.abs(got - true) - tol))
            out.append(f"{n}: numpy {got[i]:.6g} vs mpmath {true[i]:.6g}")
    return out


def expectations(case: Case, ref, grads: dict, threshold: float,
                 untouched: frozenset[str] = frozenset()) -> dict[str, str]:
    """Per tensor: 'fail' (must fail), 'quiet' (must not fail), or 'any'. ``untouched``: the
    tensors whose gradient the bug leaves bit for bit as the correct version gives it; they are
    judged as the correct version is (never 'fail': rounding in the user's own backward, as a
    1 - tanh**2 near saturation, is not the bug)."""
    floors, u, out = _floors(ref), unit(case.dtype), {}
    for n, g in ref.grads.items():
        idx = ref.evaluated[n]
        true, got = _flat(g, idx), _flat(grads[n], idx)
        delta = np.abs(got - true)
        floor = floors[n]
        if not np.any(got) and np.any(true):
            # A whole gradient left out (exactly zero) is judged at the tensor's own scale, as
            # gradprobe judges it: the target's floor is there for a zero gradient against
            # rounding, and a resolvable derivative of another size is not rounding.
            floor = max(1e-3 * float(np.sqrt(np.mean(true ** 2))), 1e-300)
        rel = delta / np.maximum(np.maximum(np.abs(got), np.abs(true)), floor)
        radius = _flat(ref.radius[n], idx)
        resolvable = delta * radius >= 100 * u * ref.magnitude
        if case.correct or n in untouched or case.bug.tensor != n and np.all(rel < threshold / 3):
            out[n] = "quiet" if np.all(rel < threshold / 3) or case.correct else "any"
        elif np.any((rel > 1.5 * threshold) & resolvable):
            out[n] = "fail"
        else:
            out[n] = "quiet" if np.all(rel < threshold / 3) else "any"
    return out


def resolves_threshold(case: Case, ref, threshold: float) -> bool:
    """Every coordinate would resolve an error of the threshold's size in the dtype, by the
    rule a bug must meet to be expected to fail (its effect over the coordinate's smooth
    radius at least 100 unit roundoffs of the loss's summands): an inconclusive verdict
    elsewhere may be the arithmetic's limit rather than gradprobe's."""
    floors, u = _floors(ref), unit(case.dtype)
    for n, g in ref.grads.items():
        idx = ref.evaluated[n]
        error = threshold * np.maximum(np.abs(_flat(g, idx)), floors[n])
        if np.any(error * _flat(ref.radius[n], idx) < 100 * u * ref.magnitude):
            return False
    return True


def _untouched(case: Case, grads: dict[str, np.ndarray]) -> frozenset[str]:
    """The tensors whose gradient a buggy case's backward gives bit for bit as its correct
    version's does (none for a correct case)."""
    if case.correct:
        return frozenset()
    ns = load(case.with_bug(None))
    with np.errstate(all="ignore"):
        right = _gradients(ns, *ns["setup"]())
    return frozenset(n for n, g in grads.items()
                     if n in right and g.shape == right[n].shape and np.array_equal(g, right[n], equal_nan=True))


def _found_off_the_point(t) -> bool:
    """Every failing coordinate of the tensor failed at a point moved off its kinks (by the
    second look's narrow move of every tensor, or its wider move of this tensor alone)."""
    failing = [d for d in t.details if d.status == "fail"]
    return t.status == "fail" and len(failing) == t.failed and all(
        "at a point moved" in (d.reason or "") for d in failing)


def judge(category: str, seed: int, /, **options) -> dict:
    """Everything the bench and the tests count about one case."""
    case = make_case(category, seed)
    rng = np.random.default_rng([11, seed])
    out = {"name": case.name, "category": category, "seed": seed, "dtype": case.dtype, "flavor": case.flavor,
           "correct": case.correct, "bug": None if case.bug is None else case.bug.kind, "crash": None,
           "unverified": None, "expect": {}, "status": {}, "false_alarm": False, "inconclusive": False,
           "expect_fail": False, "found": False, "missed": False, "to_locate": False, "located": False,
           "evals_per_coord": None, "warned": False, "own_warnings": [], "resolves": False}
    ref = reference(case, _subset(case, rng))
    problems = verify(case, ref, rng)
    if problems:
        out["unverified"] = problems[0]
    ns = load(case)
    params, inputs = ns["setup"]()
    with np.errstate(all="ignore"):
        grads = _gradients(ns, params, inputs)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            report = gradprobe.probe(ns["forward"], ns["backward"], params, inputs, label=case.name, **options)
        runtime = [w for w in caught if issubclass(w.category, RuntimeWarning)]
        out["warned"] = any(w.filename.startswith("<adversarial") for w in runtime)  # the target's code
        out["own_warnings"] = sorted({f"{Path(w.filename).name}:{w.lineno} {w.message}" for w in runtime
                                      if "gradprobe" in w.filename})  # leaked from gradprobe itself
    except ProbeError as exc:
        out["crash"] = f"exit 2: {exc}"
        return out
    except Exception as exc:  # noqa: BLE001 - an internal error is what we count
        out["crash"] = f"{type(exc).__name__}: {exc} @ {traceback.extract_tb(exc.__traceback__)[-1].name}"
        return out
    status = {t.name: str(t.status.value if hasattr(t.status, 'value') else t.status) for t in report.tensors}
    out["status"] = status
    coords = report.checked + sum(len(t.directions) for t in report.tensors)
    out["evals_per_coord"] = report.evaluations / max(1, coords)
    out["inconclusive"] = "inconclusive" in status.values()
    if out["unverified"]:
        return out
    expect = expectations(case, ref, grads, report.threshold, _untouched(case, grads))
    if case.bug is not None and expect.get(case.bug.tensor) == "quiet" and _found_off_the_point(
            report.tensor(case.bug.tensor)):
        expect[case.bug.tensor] = "any"
    out["expect"] = expect
    out["resolves"] = resolves_threshold(case, ref, report.threshold)
    if case.correct and out["inconclusive"] and case.flavor not in ("generic", "castback"):  # no wider run
        out["ratios"] = [r for _, _, r in ratios(case, ns, ref, _floors(ref), report)]
        out["best_steps"] = [r for _, _, r in best_steps(case, ns, ref, _floors(ref), report)]
    out["false_alarm"] = any(status.get(n) == "fail" for n, e in expect.items() if e == "quiet")
    must = [n for n, e in expect.items() if e == "fail"]
    out["expect_fail"] = bool(must)
    out["found"] = bool(must) and all(status.get(n) == "fail" for n in must)
    out["missed"] = any(status.get(n) in ("pass", "kink") for n in must)
    if must and case.bug.kind == "element":
        out["to_locate"] = True
        t = report.tensor(case.bug.tensor)
        out["located"] = t.status == "fail" and (case.bug.index in t.bad_indices or t.worst_index == case.bug.index)
    return out
