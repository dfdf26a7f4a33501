"""The property suite at scale: seeded random compositions, correct and with one planted bug.

Run by hand: ``python bench/property_suite.py [--n 1000] [--large-seeds 5]``. The cases are the
ones ``tests/test_property_suite.py`` samples (``tests/composer``), N spread evenly over the
categories, seeds 0, 1, 2, ... in each. Prints per category:

- ``count``; ``false alarm``: correct targets with a ``fail`` tensor, or buggy targets where a
  tensor the bug left unchanged fails; ``inconcl``: targets with an ``inconclusive`` tensor;
  ``kink``: targets with a ``kink`` verdict, and how many of those name a tensor with no
  coordinate exactly at a kink (spurious); ``recall``: buggy targets whose every wrong tensor
  fails; ``located``: one-element bugs whose tensor fails with the index in ``bad_indices``
  (or as ``worst_index``); ``evals/coord``: forward
  evaluations per checked coordinate (mean); ``worst rel``: the largest reported max_rel_error
  among correct float64 targets at least 1e-3 from any kink (smooth at the point), and in
  brackets the largest among tensors that pass.
- the first failing seeds of each category, to rerun with ``pytest -k "CATEGORY-SEED"``.
- the ~290k-param ReLU MLP and its tanh twin with the default plan: correct, one element of the
  biggest weight's gradient 1% off, and set to zero.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import defaultdict
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from composer.cases import CATEGORIES, make_case, problems
from composer.large import BENCH_SIZES, biggest_weight, mlp, one_element_bug
from composer.reference import nearest_kink

import gradprobe


def _probe(net):
    return gradprobe.probe(net.forward, net.backward, net.params, net.inputs)


def run_category(category: str, count: int, offset: int) -> dict:
    tally = defaultdict(float)
    tally["worst"] = 0.0
    examples: list[str] = []
    for seed in range(offset, offset + count):
        case = make_case(category, seed)
        report = _probe(case.net)
        found = problems(report, case)
        statuses = {t.name: t.status for t in report.tensors}
        tally["count"] += 1
        tally["evals"] += report.evaluations / max(1, report.checked + sum(len(t.directions) for t in report.tensors))
        tally["inconclusive"] += "inconclusive" in statuses.values()
        kinks = [n for n, s in statuses.items() if s == "kink"]
        tally["kink"] += bool(kinks)
        tally["spurious"] += any(n not in case.net.kink_tensors for n in kinks)
        if case.correct:
            tally["false"] += "fail" in statuses.values()
            if case.float64 and nearest_kink(case.net) > 1e-3:
                rel = [t.max_rel_error for t in report.tensors if t.max_rel_error is not None]
                tally["worst"] = max(tally["worst"], max(rel, default=0.0))
                rel = [t.max_rel_error for t in report.tensors
                       if t.max_rel_error is not None and t.status == "pass"]
                tally["worst_pass"] = max(tally["worst_pass"], max(rel, default=0.0))
                tally["smooth"] += 1
        else:
            tally["bugs"] += 1
            tally["false"] += any(statuses.get(n) == "fail" for n in case.untouched)
            tally["found"] += all(statuses.get(n) == "fail" for n in case.required)
            if case.index is not None:
                t = report.tensor(case.net.bug.tensor)
                tally["to_locate"] += 1
                tally["located"] += t.status == "fail" and (
                    case.index in t.bad_indices or t.worst_index == case.index)
        if found:
            tally["problem"] += 1
            if len(examples) < 3:
                examples.append(f"{category}-{seed}: {found[0]}")
    tally["examples"] = examples
    return tally


def _rate(num: float, den: float) -> str:
    return f"{int(num)}/{int(den)}" if den else "-"


def small(n: int, offset: int) -> None:
    per = max(1, n // len(CATEGORIES))
    print(f"{per} cases per category, seeds {offset}..{offset + per - 1} ({per * len(CATEGORIES)} in all)")
    header = (f"{'category':18s} {'count':>5s} {'false alarm':>11s} {'inconcl':>8s} {'kink (spur.)':>12s} "
              f"{'recall':>9s} {'located':>9s} {'evals/coord':>11s} {'worst rel (pass)':>15s} {'off':>5s}")
    print(header)
    print("-" * len(header))
    examples = []
    totals = defaultdict(float)
    wall, cpu = time.perf_counter(), time.process_time()
    for category in CATEGORIES:
        t = run_category(category, per, offset)
        examples += t.pop("examples")
        for key, value in t.items():
            totals[key] += value
        worst = f"{t['worst']:.0e} ({t['worst_pass']:.0e})" if t["smooth"] else "-"
        print(f"{category:18s} {int(t['count']):5d} {int(t['false']):11d} {int(t['inconclusive']):8d} "
              f"{int(t['kink']):6d} ({int(t['spurious'])})".ljust(59)
              + f"{_rate(t['found'], t['bugs']):>9s} {_rate(t['located'], t['to_locate']):>9s} "
              f"{t['evals'] / t['count']:11.1f} {worst:>15s} {int(t['problem']):5d}")
    print("-" * len(header))
    print(f"{'all':18s} {int(totals['count']):5d} {int(totals['false']):11d} {int(totals['inconclusive']):8d} "
          f"{int(totals['kink']):6d} ({int(totals['spurious'])})".ljust(59)
          + f"{_rate(totals['found'], totals['bugs']):>9s} {_rate(totals['located'], totals['to_locate']):>9s} "
          f"{totals['evals'] / totals['count']:11.1f} {'':>15s} {int(totals['problem']):5d}")
    print(f"'off': cases missing any expectation of tests/composer/cases.py; "
          f"{time.perf_counter() - wall:.1f} s wall, {time.process_time() - cpu:.1f} s CPU")
    if examples:
        print("first failing cases (rerun: pytest tests/test_property_suite.py -k 'CATEGORY-SEED'):")
        for line in examples:
            print("  " + line)


def large(seeds: int) -> None:
    print(f"\nlarge networks {'-'.join(map(str, BENCH_SIZES))}, default plan")
    tally: dict[tuple[str, str], list[int]] = defaultdict(lambda: [0, 0])
    for seed in range(seeds):
        for activation in ("relu", "tanh"):
            base = mlp(seed, BENCH_SIZES, activation)
            for factor in (None, 1.01, 0.0):
                net = base if factor is None else one_element_bug(base, factor, seed)
                wall, cpu = time.perf_counter(), time.process_time()
                report = _probe(net)
                wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
                name = biggest_weight(net)
                t = report.tensor(name)
                others = sorted({s.status for s in report.tensors if s.name != name})
                label = "correct" if factor is None else f"x{factor:g} at {net.bug.index}"
                if factor is None:
                    good = all(s.status == "pass" for s in report.tensors)
                    verdict = "ok" if good else "NOT all pass"
                else:
                    located = net.bug.index in t.bad_indices
                    good = t.status == "fail" and located
                    verdict = f"bug {'found' if t.status == 'fail' else 'MISSED'}" + (
                        ", located" if located else ", not located" if t.status == "fail" else "")
                tally[(activation, label.split(" ")[0])][0] += good
                tally[(activation, label.split(" ")[0])][1] += 1
                print(f"  seed {seed} {activation:4s} {label:22s} {name} {t.status:12s} others {others}; "
                      f"{verdict}; {report.evaluations} evaluations, {wall:.1f} s wall, {cpu:.1f} s CPU")
    print("  as expected (correct: every tensor pass; bug: fail and located): " + "; ".join(
        f"{act} {what} {good}/{n}" for (act, what), (good, n) in tally.items()))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1000, help="small cases in all (default 1000)")
    parser.add_argument("--offset", type=int, default=0, help="first seed")
    parser.add_argument("--large-seeds", type=int, default=5, help="seeds of the large networks (0: skip)")
    args = parser.parse_args()
    if args.n:
        small(args.n, args.offset)
    if args.large_seeds:
        large(args.large_seeds)


if __name__ == "__main__":
    main()
