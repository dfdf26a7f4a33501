"""Size of the HTML report for a run of about 1M parameters.

Run by hand: ``python bench/html_size.py``. Prints, in bytes:
1. the page of a real check (``gradprobe check --html``) of a 1,001,301-parameter tanh network
   with one wrong weight element, in a run with a correct 203,710-parameter network;
2. the worst case at that size: the same tensors, every one failing, with a relative error
   measured at every element (a dense map for each), which bounds what maps can cost.
The goal is a page under 2 MB. ``python bench/html_size.py FOLDER`` also keeps both pages there.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from gradprobe.engine.runner import run_check
from gradprobe.settings.options import CheckOptions
from gradprobe.render.html import render_html
from gradprobe.render.svgmap import MAX_COLS, MAX_ROWS
from gradprobe.report.model import LayerResult, TargetRun
from gradprobe.targets.loading import load_target

HERE = Path(__file__).resolve().parent
TARGETS = HERE / "scale_targets.py"
WRONG_1M = f"""
import sys
sys.path.insert(0, {str(HERE)!r})
from scale_targets import Network

def case():
    return Network([1000, 800, 250, 1], batch=16, seed=1, wrong=("layer1.W", (417, 23)))
"""
LIMIT = 2_000_000


KEEP = Path(sys.argv[1]) if len(sys.argv) > 1 else None


def real_run() -> int:
    with tempfile.TemporaryDirectory() as folder:
        target = Path(folder) / "wrong_1m.py"
        target.write_text(WRONG_1M)
        page = Path(folder) / "report.html"
        start = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "gradprobe", "check", f"{target}:case",
                               f"{TARGETS}:one_wrong_200k", "--html", str(page), "-q"],
                              capture_output=True, text=True)
        seconds = time.perf_counter() - start
        size = page.stat().st_size
        if KEEP is not None:
            (KEEP / "real_run.html").write_bytes(page.read_bytes())
        print(f"1. real run, 1,001,301 + 203,710 parameters, exit {done.returncode}, "
              f"{seconds:.1f} s: page {size:,} bytes ({size / LIMIT:.1%} of 2 MB)")
        print("   " + done.stdout.strip().replace("\n", "\n   "))
    return size


def _worst_map(shape, rng) -> np.ndarray:
    """Errors whose every map cell (after folding and reduction) lands on a random decade,
    so no two neighbouring cells merge: the largest map the page can hold."""
    flat = (int(np.prod(shape[:-1])), shape[-1]) if len(shape) > 1 else (1, shape[0])
    cells = [min(n, m) for n, m in zip(flat, (MAX_ROWS, MAX_COLS))]
    coarse = 10.0 ** rng.uniform(-8, 2, size=cells)
    rows = np.minimum(np.arange(flat[0]) * cells[0] // flat[0], cells[0] - 1)
    cols = np.minimum(np.arange(flat[1]) * cells[1] // flat[1], cells[1] - 1)
    return coarse[np.ix_(rows, cols)].reshape(shape)


def worst_case() -> int:
    report = run_check(load_target(f"{TARGETS}:correct_1m"), CheckOptions())
    rng = np.random.default_rng(0)
    layers = []
    for layer in report.layers:
        tensors = []
        for t in layer.tensors:
            errors = _worst_map(t.shape, rng)
            tensors.append(replace(t, status="fail", failed=t.size, checked=t.size, error_map=errors))
        layers.append(LayerResult(layer.name, tuple(tensors)))
    failing = replace(report, layers=tuple(layers))
    start = time.process_time()
    page = render_html([TargetRun(report.target, 1, report=failing)], "gradprobe check ...")
    cpu = time.process_time() - start
    size = len(page.encode())
    if KEEP is not None:
        (KEEP / "worst_case.html").write_text(page)
    params = sum(t.size for t in failing.tensors)
    print(f"2. worst case, {params:,} parameters, all {len(failing.tensors)} tensors failing with "
          f"dense maps: page {size:,} bytes ({size / LIMIT:.1%} of 2 MB), rendered in {cpu:.2f} s CPU")
    return size


if __name__ == "__main__":
    sizes = [real_run(), worst_case()]
    print("under 2 MB:", all(s < LIMIT for s in sizes))
