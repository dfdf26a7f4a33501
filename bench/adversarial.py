"""The adversarial generator at scale: cases written from the opposite angle to the property
suite, each judged against an mpmath reference (tests/adversarial).

Run by hand, with the gradprobe to test first on the path: ``PYTHONPATH=/path/to/checkout python
bench/adversarial.py [--n 1000] [--offset 0] [--categories steep,kinks]
[--jobs 2] [--out /tmp/adversarial-failures] [--options '{"method": "richardson"}']``.
N cases are spread evenly over the chosen categories, seeds OFFSET, OFFSET+1, ... in each.
Prints per category:

- ``count``, ``correct``/``buggy``; ``unverif``: cases whose correct gradient does not agree with
  mpmath to the dtype's rounding (no expectation; should be 0);
- ``false alarm``: a tensor fails that mpmath says is within a third of the threshold;
- ``inconcl``: targets with an inconclusive tensor (correct ones, then buggy ones); below the
  table, the same among correct targets whose every coordinate would resolve an error of the
  threshold's size in the dtype (the rule ``recall`` uses for a bug): elsewhere the dtype's
  arithmetic, not gradprobe, may be what leaves a tensor undecided; and the inconclusive correct
  targets with no wider run by how far the loss's rounding, measured against mpmath along each
  undecided coordinate over its smooth radius, lets an error of the threshold's size show
  (tests/adversarial/rounding.py: below 1x no step can); and by their hardest undecided
  coordinate's best single step, truncation or rounding against mpmath over the tolerance
  (above 1 no single step resolves the threshold);
- ``recall``: buggy targets with a bug above 1.5x the threshold and resolvable in the dtype whose
  every such tensor fails; ``missed``: one of them says pass or kink;
- ``located``: one-element bugs found with the element in bad_indices or as worst_index;
- ``crashes``: exceptions from gradprobe (the CLI's exit 2 or 3) on these valid targets;
- ``warned t/g``: targets whose own code raised a RuntimeWarning at a point gradprobe moved to
  (t), and targets where a RuntimeWarning leaked from gradprobe's own code (g; listed below);
- ``evals/coord``: forward evaluations per checked coordinate or direction (mean).

Every false alarm, miss, crash and unverified case is listed by name (CATEGORY-SEED) and, with
``--out``, written there as a standalone target (``NAME.py`` + ``NAME.npz``) for
``gradprobe check NAME.py``.

Shapes and layouts are also fuzzed systematically (every shape through every path of a check,
correct and buggy) in ``tests/test_shape_fuzz.py``, part of the test suite; the ``shapes``
category here draws them at random inside larger expressions.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

# Only the generator comes from this checkout: gradprobe is whichever one PYTHONPATH (or the
# installed package) gives, so the same cases can be run against another worktree's engine.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from adversarial import ALL_CATEGORIES, CATEGORIES, judge, make_case  # noqa: E402
from adversarial.case import write  # noqa: E402

import gradprobe  # noqa: E402


def _one(job: tuple[str, int, dict]) -> dict:
    category, seed, options = job
    try:
        return judge(category, seed, **options)
    except Exception as exc:  # noqa: BLE001 - a generator problem is reported, not hidden
        return {"name": f"{category}-{seed}", "category": category, "seed": seed,
                "generator_error": f"{type(exc).__name__}: {exc}"}


def _problem(o: dict) -> str | None:
    if o.get("generator_error"):
        return "generator error: " + o["generator_error"]
    if o.get("crash"):
        return "crash: " + o["crash"]
    if o.get("unverified"):
        return "unverified: " + o["unverified"]
    if o["false_alarm"]:
        bad = [n for n, e in o["expect"].items() if e == "quiet" and o["status"].get(n) == "fail"]
        return f"false alarm ({'correct' if o['correct'] else o['bug']}, {o['dtype']} {o['flavor']}): {bad}"
    if o["missed"]:
        return f"missed {o['bug']} ({o['dtype']} {o['flavor']}): {o['status']}"
    if o["expect_fail"] and not o["found"]:
        return f"not failed {o['bug']} ({o['dtype']} {o['flavor']}): {o['status']}"
    if o["to_locate"] and o["found"] and not o["located"]:
        return f"not located ({o['dtype']}): {o['status']}"
    return None


def tally(outcomes: list[dict]) -> dict:
    t = defaultdict(float)
    for o in outcomes:
        t["count"] += 1
        if o.get("generator_error"):
            t["generator"] += 1
            continue
        t["correct" if o["correct"] else "buggy"] += 1
        t["crash"] += bool(o["crash"])
        t["unverified"] += bool(o["unverified"])
        t["warned"] += o["warned"]
        t["leaked"] += bool(o["own_warnings"])
        if o["crash"]:
            continue
        t["false"] += o["false_alarm"]
        t["inc_correct" if o["correct"] else "inc_buggy"] += o["inconclusive"]
        if o["correct"] and o.get("resolves"):
            t["resolving"] += 1
            t["inc_resolving"] += o["inconclusive"]
        t["expect_fail"] += o["expect_fail"]
        t["found"] += o["found"]
        t["missed"] += o["missed"]
        t["to_locate"] += o["to_locate"]
        t["located"] += o["located"]
        if o["evals_per_coord"] is not None:
            t["evals"] += o["evals_per_coord"]
            t["evals_n"] += 1
    return t


def _rate(num: float, den: float) -> str:
    return f"{int(num)}/{int(den)}" if den else "-"


HEADER = (f"{'category':12s} {'count':>5s} {'corr/bug':>9s} {'unverif':>7s} {'false alarm':>11s} "
          f"{'inconcl c/b':>11s} {'recall':>9s} {'missed':>6s} {'located':>8s} {'crashes':>7s} "
          f"{'warned t/g':>10s} {'evals/coord':>11s}")


def row(name: str, t: dict) -> str:
    evals = f"{t['evals'] / t['evals_n']:.1f}" if t["evals_n"] else "-"
    return (f"{name:12s} {int(t['count']):5d} {int(t['correct']):4d}/{int(t['buggy']):<4d} {int(t['unverified']):7d} "
            f"{int(t['false']):11d} {int(t['inc_correct']):5d}/{int(t['inc_buggy']):<5d} "
            f"{_rate(t['found'], t['expect_fail']):>9s} {int(t['missed']):6d} {_rate(t['located'], t['to_locate']):>8s} "
            f"{int(t['crash'] + t['generator']):7d} {int(t['warned']):5d}/{int(t['leaked']):<4d} {evals:>11s}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1000, help="cases in all, spread over the categories (default 1000)")
    parser.add_argument("--offset", type=int, default=0, help="first seed (default 0)")
    parser.add_argument("--categories", default=",".join(CATEGORIES),
                        help=f"comma-separated subset of {','.join(ALL_CATEGORIES)} (default: all but "
                             f"{','.join(c for c in ALL_CATEGORIES if c not in CATEGORIES)})")
    parser.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    parser.add_argument("--out", default=None, help="folder to write failing cases to as standalone targets")
    parser.add_argument("--options", default="{}", help="gradprobe options as JSON, e.g. '{\"method\": \"richardson\"}'")
    parser.add_argument("--json", default=None, help="write every case's outcome to this JSON file")
    args = parser.parse_args(argv)
    categories = [c.strip() for c in args.categories.split(",") if c.strip()]
    unknown = [c for c in categories if c not in ALL_CATEGORIES]
    if unknown:
        parser.error(f"unknown categories {unknown}; choose from {', '.join(ALL_CATEGORIES)}")
    options = json.loads(args.options)
    per = max(1, args.n // len(categories))
    jobs = [(c, s, options) for c in categories for s in range(args.offset, args.offset + per)]
    print(f"{per} cases per category, seeds {args.offset}..{args.offset + per - 1} ({len(jobs)} in all), "
          f"options {options}, gradprobe from {Path(gradprobe.__file__).parent}")
    wall, cpu = time.perf_counter(), time.process_time()
    if args.jobs > 1:
        with ProcessPoolExecutor(args.jobs) as pool:
            outcomes = list(pool.map(_one, jobs, chunksize=4))
    else:
        outcomes = [_one(j) for j in jobs]
    print(HEADER)
    print("-" * len(HEADER))
    by = defaultdict(list)
    for o in outcomes:
        by[o["category"]].append(o)
    for c in categories:
        print(row(c, tally(by[c])))
    print("-" * len(HEADER))
    print(row("all", tally(outcomes)))
    print("inconclusive among correct targets whose every coordinate resolves an error of the threshold's "
          "size (as a bug must to be expected to fail): "
          + ", ".join(f"{c} {_rate(t['inc_resolving'], t['resolving'])}" for c, t in
                      ((c, tally(by[c])) for c in categories)))
    measured = [o for o in outcomes if o.get("ratios") is not None]
    if measured:
        # The most resolvable coordinate each such target left undecided (tests/adversarial/rounding.py).
        best = {o["name"]: max(o["ratios"], default=float("nan")) for o in measured}
        low = sorted(n for n, r in best.items() if r < 1)
        mid = sorted(n for n, r in best.items() if 1 <= r < 10)
        high = sorted(n for n, r in best.items() if not r < 10)
        print(f"inconclusive correct targets with no wider run, by how far the loss's rounding (against mpmath) "
              f"lets an error of the threshold's size show on their most resolvable undecided coordinate: "
              f"below 1x (no step can) {len(low)}, 1-10x {len(mid)} ({', '.join(f'{n} {best[n]:.2g}' for n in mid)}), "
              f"10x and more {len(high)} ({', '.join(f'{n} {best[n]:.2g}' for n in high)})")
        # The hardest coordinate each left undecided: its best single step's error over the tolerance.
        hard = {o["name"]: max(o.get("best_steps") or [float("nan")]) for o in measured}
        fine = sorted(n for n, r in hard.items() if r < 0.1)
        edge = sorted(n for n, r in hard.items() if 0.1 <= r < 1)
        print(f"the same by their hardest undecided coordinate's best single step (truncation or rounding "
              f"against mpmath, central or one-sided) over the tolerance: below 0.1 {len(fine)} "
              f"({', '.join(f'{n} {hard[n]:.2g}' for n in fine)}), 0.1-1 {len(edge)} "
              f"({', '.join(f'{n} {hard[n]:.2g}' for n in edge)}), 1 and more (no single step resolves the "
              f"threshold) {len(hard) - len(fine) - len(edge)}")
    print(f"{time.perf_counter() - wall:.1f} s wall, {time.process_time() - cpu:.1f} s CPU (this process)")
    leaks = defaultdict(list)
    for o in outcomes:
        for w in o.get("own_warnings") or []:
            leaks[w].append(o["name"])
    for w, names in leaks.items():
        print(f"warning leaked from gradprobe: {w} ({len(names)} cases, e.g. {', '.join(names[:4])})")
    listed = [(o, _problem(o)) for o in outcomes]
    listed = [(o, p) for o, p in listed if p]
    if listed:
        print("\ncases to look at (rerun one: python -c \"from adversarial import judge; print(judge('CAT', SEED))\" "
              "with tests/ on the path, or --out):")
        for o, p in listed:
            print(f"  {o['name']}: {p}")
            if args.out:
                write(make_case(o["category"], o["seed"]), args.out, p)
    if args.json:
        Path(args.json).write_text(json.dumps(outcomes, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
