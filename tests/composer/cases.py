"""The suite's categories, one seeded case per (category, seed), and what its report must say.

Expectations (from the project's goals for verdicts a CI can trust):

- correct target: no tensor ``fail`` (a false alarm); in float64 no tensor ``inconclusive``
  unless every gradient of the target is faint, or the tensor's own gradients are too faint
  for a verdict at the 1e-6 threshold (:mod:`composer.scale`, ``UNDECIDABLE``);
  ``kink`` only on a tensor with a coordinate placed exactly at a kink (near a kink the
  derivative exists, and a Huber switch point is a corner, not a kink: both must ``pass``),
  or 1e-9 from one, closer than rounding may let a step resolve (``Net.hairline_tensors``);
- buggy target: every tensor the bug makes wrong (beyond faint) is ``fail``; for a one-element bug in a tensor
  of 6 or more elements the planted index is in ``bad_indices`` (or is ``worst_index``); a tensor
  whose gradient the bug left bitwise unchanged does not fail.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass

import numpy as np

from .bugs import KINDS, plant
from .builder import build
from .graph import Net
from .scale import FAINT, UNDECIDABLE, sane, sensitivity

# category -> (dtype, scalar output?, kink placement); None: drawn per case.
CORRECT = {
    "f64-scalar": (np.float64, True, "none"),
    "f64-array": (np.float64, False, "none"),
    "f32-scalar": (np.float32, True, None),
    "f32-array": (np.float32, False, None),
    "kink-at": (np.float64, None, "at"),
    "kink-near": (np.float64, None, "near"),
    "huber-corner": (np.float64, True, "corner"),
}
BUGS = {f"bug-{kind}": kind for kind in KINDS}
CATEGORIES = tuple(CORRECT) + tuple(BUGS)


@dataclass(frozen=True)
class Case:
    category: str
    seed: int
    net: Net
    correct: bool
    required: frozenset[str] = frozenset()  # must fail
    untouched: frozenset[str] = frozenset()  # gradient unchanged by the bug: must not fail
    index: tuple[int, ...] | None = None  # must be located
    faint: bool = False  # every gradient below what differences resolve (composer.scale)
    undecidable: frozenset[str] = frozenset()  # tensors too faint for a verdict at 1e-6

    @property
    def float64(self) -> bool:
        return self.net.dtype == np.float64

    def describe(self) -> str:
        bug = self.net.bug
        what = "correct" if bug is None else (
            f"bug {bug.kind} in {bug.tensor or bug.node}"
            + (f" x{bug.factor:g}" if bug.kind in ("factor", "element") else "")
            + (f" at {bug.index}" if bug.index is not None else "")
            + f"; must fail: {sorted(self.required)}")
        what += "; every gradient faint" if self.faint else ""
        kinks = f"; exactly at a kink: {sorted(self.net.kink_tensors)}" if self.net.kink_tensors else ""
        return f"{self.category} seed {self.seed}: {what}{kinks}\n  network: {self.net.description}"


REQUIRE = {"transpose": "square", "accumulation": "fanout"}


def _draw(rng, dtype, scalar, kink, require):
    """A network and the grad_output it is judged with (None for a loss); (None, None) when
    its values overflow, so the caller draws again."""
    net = build(rng, dtype, scalar, kink, require)
    with np.errstate(all="ignore"):
        out = net.forward(net.params, net.inputs)
    grad_output = None if scalar else rng.normal(size=np.shape(out))
    return (net, grad_output) if sane(net, grad_output) else (None, None)


def make_case(category: str, seed: int) -> Case:
    rng = np.random.default_rng([zlib.crc32(category.encode()), seed])
    for _ in range(100):
        if category in CORRECT:
            dtype, scalar, kink = CORRECT[category]
            scalar = bool(rng.random() < 0.5) if scalar is None else scalar
            kink = str(rng.choice(["none", "at", "near"])) if kink is None else kink
            net, grad_output = _draw(rng, dtype, scalar, kink, None)
            if net is None:
                continue
            strength = sensitivity(net, net.backward(net.params, net.inputs, grad_output), grad_output)
            return Case(category, seed, net, True, faint=max(strength.values()) < FAINT,
                        undecidable=frozenset(k for k, v in strength.items() if v < UNDECIDABLE))
        kind = BUGS[category]
        dtype = np.float32 if rng.random() < 0.25 else np.float64
        scalar = bool(rng.random() < 0.5)
        kink = str(rng.choice(["none", "at", "near"]))
        net, grad_output = _draw(rng, dtype, scalar, kink, REQUIRE.get(kind))
        planted = None if net is None else plant(rng, net, kind, grad_output)
        if planted is not None:
            return Case(category, seed, planted.net, False, planted.required, planted.untouched,
                        planted.index)
    raise RuntimeError(f"no network of {category} seed {seed} offers a place for the bug")


def problems(report, case: Case) -> list[str]:
    """Every way ``report`` misses the case's expectations (empty: all met)."""
    found: list[str] = []
    by_name = {t.name: t for t in report.tensors}
    found += [f"{t.name} is inconclusive with no reason given" for t in report.tensors
              if t.status == "inconclusive" and not t.inconclusive_reason]
    if case.correct:
        for t in report.tensors:
            if t.status == "fail":
                found.append(f"false alarm: {t.name} is fail on a correct backward")
            elif (t.status == "inconclusive" and case.float64 and not case.faint
                  and t.name not in case.undecidable):
                found.append(f"{t.name} is inconclusive on correct float64 code")
            elif t.status == "kink" and t.name not in case.net.kink_tensors | case.net.hairline_tensors:
                found.append(f"{t.name} is kink but none of its coordinates is exactly at a kink")
        return found
    for name in sorted(case.required):
        t = by_name.get(name)
        if t is None or t.status != "fail":
            found.append(f"bug missed: {name} is {t.status if t else 'absent'}, must be fail")
    if case.index is not None:
        t = by_name.get(case.net.bug.tensor)
        if t is not None and case.index not in t.bad_indices and t.worst_index != case.index:
            found.append(f"bug not located: {case.index} is neither in bad_indices "
                         f"{list(t.bad_indices)[:8]} nor the worst index {t.worst_index}")
    for name in sorted(case.untouched):
        if name in by_name and by_name[name].status == "fail":
            found.append(f"false alarm: {name} is fail though the bug left its gradient unchanged")
    return found
