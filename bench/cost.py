"""What a check costs against a plain loop of central differences, end to end.

Run by hand: ``python bench/cost.py [--pairs 3]``. Targets from ``cost_cases.py``:

1. ``regression`` (1,312 coordinates, a mean over 64,000 values, about 1 ms per forward) and
   ``small`` (the same network, about 10 us): the wall time of
   ``python -m gradprobe check bench/cost_cases.py:NAME --json -`` in a fresh process against
   a fresh process running a plain loop of central differences (step 1e-6 * max(1, |x|)) over
   every coordinate (``python bench/cost_cases.py NAME``); the two alternate, the median of
   PAIRS ratios is printed, with CPU time beside wall time, and gradprobe's evaluations per
   coordinate (the plain loop spends 2). Goals: at most 1.2 (1 ms), 1.5 (10 us).
2. ``dense`` with ``--method richardson``: the error of the numeric derivatives against the
   exact gradient (the closed form evaluated in mpmath at 40 digits), relative to the larger
   of the coordinate's gradient and its tensor's rms gradient (``scaled``, see
   ``accuracy.error_figures``; also the normwise figure and gradprobe's own reported relative
   error, whose floor of 1e-3 of the rms gradient magnifies the rounding noise of near-zero
   gradients), and evaluations per coordinate (every forward call of the check, over the
   coordinates). Goal: scaled at most 1e-11 at at most 6 per coordinate.
"""

from __future__ import annotations

import argparse
import compileall
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from cost_cases import CASES  # noqa: E402


def _env() -> dict[str, str]:
    path = os.environ.get("PYTHONPATH", "")
    return {**os.environ, "PYTHONPATH": f"{ROOT}{os.pathsep}{path}" if path else str(ROOT)}


def timed(args: list[str]) -> tuple[float, float, str]:
    """Wall and CPU time of a fresh process, and its standard output."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    wall = time.perf_counter()
    out = subprocess.run(args, capture_output=True, text=True, cwd=ROOT, env=_env())
    wall = time.perf_counter() - wall
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    if out.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(args)} exited {out.returncode}: {out.stderr.strip()}")
    return wall, cpu, out.stdout


def end_to_end(name: str, pairs: int) -> None:
    ours = [sys.executable, "-m", "gradprobe", "check", f"bench/cost_cases.py:{name}", "--json", "-"]
    plain = [sys.executable, "bench/cost_cases.py", name]
    walls, cpus, report = [], [], None
    for k in range(pairs):
        if k % 2 == 0:
            a = timed(ours)
            b = timed(plain)
        else:
            b = timed(plain)
            a = timed(ours)
        walls.append(a[0] / b[0])
        cpus.append(a[1] / max(b[1], 1e-9))
        report, _ = json.JSONDecoder().raw_decode(a[2].lstrip())
    assert report is not None
    coordinates = sum(t["size"] for layer in report["layers"] for t in layer["tensors"])
    evaluations = report["summary"]["evaluations"]
    walls.sort()
    cpus.sort()
    print(f"{name:10s} {coordinates} coordinates, {evaluations} evaluations "
          f"({evaluations / coordinates:.2f} per coordinate; the plain loop 2), "
          f"exit {'ok' if report['ok'] else 'FAIL'}: median ratio wall {walls[pairs // 2]:.2f} "
          f"(CPU {cpus[pairs // 2]:.2f}) over {pairs} alternating pairs; "
          f"wall ratios {', '.join(f'{w:.2f}' for w in walls)}")


def accuracy() -> None:
    import gradprobe
    from accuracy import error_figures

    case = CASES["dense"]()
    params, inputs = case.setup()
    reference = case.reference(params, inputs)  # the closed form in mpmath at 40 digits
    report = gradprobe.probe(case.forward, case.backward, params, inputs, method="richardson")
    coordinates = sum(t.size for t in report.tensors)
    figures = error_figures(report, reference)
    scaled = max(f[0] for f in figures.values())
    normwise = max(f[1] for f in figures.values())
    print(f"dense --method richardson: {coordinates} coordinates, "
          f"{report.evaluations / coordinates:.2f} evaluations per coordinate; error of the numeric "
          f"derivative against the closed form (mpmath, 40 digits) relative to max(|gradient|, "
          f"the tensor's rms gradient) {scaled:.1e}, normwise {normwise:.1e} (goal <= 1e-11 at "
          f"<= 6); gradprobe's reported relative error "
          f"{max(t.max_rel_error for t in report.tensors):.1e}; per tensor (scaled, normwise, "
          f"absolute, reported, evaluations per coordinate): "
          + "; ".join(f"{t.name} {figures[t.name][0]:.1e} {figures[t.name][1]:.1e} "
                      f"{figures[t.name][2]:.1e} {t.max_rel_error:.1e} {t.evaluations / t.size:.2f}"
                      for t in report.tensors))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=3)
    parser.add_argument("--only", choices=("regression", "small", "dense"))
    args = parser.parse_args()
    # The tree the fresh processes import (PYTHONPATH=ROOT), byte-compiled as ``pip install``
    # does: with PYTHONDONTWRITEBYTECODE set they would compile every module on every start
    # (not the tree ``import gradprobe`` finds here, which may be another checkout's).
    compileall.compile_dir(str(ROOT / "gradprobe"), quiet=1)
    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    for name in ("regression", "small"):
        if args.only in (None, name):
            end_to_end(name, args.pairs)
    if args.only in (None, "dense"):
        accuracy()


if __name__ == "__main__":
    main()
