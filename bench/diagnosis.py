"""How the hints fare on the purpose-made buggy, decoy and correct targets in tests/bugzoo*.py.

Run by hand: ``python bench/diagnosis.py`` (``-v`` also lists every flagged tensor with its
hint). Prints the tally per bug class, then in all: failing tensors with the right hint, rightly
without one (random errors and decoys that fit no single cause), without one where a hint was
expected, with a wrong hint; correct tensors called failures; forward evaluations.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from bugzoo import CASES, Tally
from bugzoo_decoys import DECOY_CASES
from bugzoo_reuse import REUSE_CASES

from gradprobe import probe


def main(verbose: bool = False) -> None:
    tally = Tally()
    evaluations = 0
    started, cpu = time.perf_counter(), time.process_time()
    makers = CASES + REUSE_CASES + DECOY_CASES
    for make in makers:
        case = make()
        report = probe(case.forward, case.backward, case.params, case.inputs)
        evaluations += report.evaluations
        tally.add(case, report)
        if verbose:
            print(f"{case.name}  [{case.kind}]")
            for t in report.tensors:
                if t.status != "pass":
                    print(f"    {t.name:12s} {t.status:12s} {t.hint or '(no hint)'}")
    wall, cpu = time.perf_counter() - started, time.process_time() - cpu
    print(f"{'bug class':26s} {'right hint':>10s} {'rightly none':>12s} {'no hint':>8s} {'wrong hint':>10s}")
    for kind in sorted(tally.per_kind):
        right, silent, none, wrong = tally.per_kind[kind]
        print(f"{kind:26s} {right:10d} {silent:12d} {none:8d} {wrong:10d}")
    failing = tally.right_hint + tally.silent + tally.no_hint + tally.wrong_hint
    print()
    print(f"targets                       {len(makers)}")
    print(f"failing tensors               {failing}")
    print(f"  with the right hint         {tally.right_hint}")
    print(f"  rightly with no hint        {tally.silent} (random errors, decoys fitting no one cause)")
    print(f"  with no hint, one expected  {tally.no_hint}")
    print(f"  with a wrong hint           {tally.wrong_hint}")
    print(f"expected failures missed      {tally.missed}")
    print(f"correct tensors               {tally.correct_tensors}")
    print(f"  called failures             {tally.false_failures}")
    print(f"forward evaluations in all    {evaluations}")
    print(f"time                          {wall:.2f} s wall, {cpu:.2f} s CPU")
    for line in tally.lines:
        print("  !", line)


if __name__ == "__main__":
    main(verbose="-v" in sys.argv[1:])
