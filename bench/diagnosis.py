"""How the hints fare on the purpose-made buggy and correct targets of tests/bugzoo.py.

Run by hand: ``python bench/diagnosis.py``. Prints, per case, the tensors that did not pass
with their hints, then the tally: failures with the right hint, with a wrong hint, with no
hint, and correct tensors called failures.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from bugzoo import CASES, Tally

from gradprobe import probe


def main() -> None:
    tally = Tally()
    evaluations = 0
    for make in CASES:
        case = make()
        report = probe(case.forward, case.backward, case.params, case.inputs)
        evaluations += report.evaluations
        tally.add(case, report)
        flagged = [t for t in report.tensors if t.status != "pass"]
        print(f"{case.name}")
        for t in flagged:
            print(f"    {t.name:10s} {t.status:12s} {t.hint or '(no hint)'}")
    failing = tally.right_hint + tally.wrong_hint + tally.no_hint
    print()
    print(f"targets                       {len(CASES)}")
    print(f"failing tensors               {failing}")
    print(f"  with the right hint         {tally.right_hint}")
    print(f"  with a wrong hint           {tally.wrong_hint}")
    print(f"  with no hint                {tally.no_hint} (random errors expect none)")
    print(f"expected failures missed      {tally.missed}")
    print(f"correct tensors               {tally.correct_tensors}")
    print(f"  called failures             {tally.false_failures}")
    print(f"forward evaluations in all    {evaluations}")
    for line in tally.lines:
        print("  !", line)


if __name__ == "__main__":
    main()
