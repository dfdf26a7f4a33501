"""What checking a hand-written Hessian-vector product costs, by size.

Run by hand: ``python bench/second_order.py``. For an extended Rosenbrock valley of n = 10,
1,000 and 100,000 coordinates (our own hand-written gradient and product, the published
formulas), the check of the hvp form is timed after the gradient check, correct and with one
element of the product wrong. Printed per size: forward evaluations of the whole run and of
the second-order check, backward and hvp calls, wall and CPU seconds of the second-order
check and of the gradient check alone (same run, ``--second-order off``, alternated), and
their ratio. Goals: two backward calls per direction (columns plus random directions) when
nothing fails; a dense or hvp check of side n in O(n) backward calls, never O(n^2) forward
calls.
"""

from __future__ import annotations

import time

import numpy as np

from gradprobe import probe


def valley(n: int, wrong: int | None = None):
    def forward(p, i):
        x = p["x"]
        return float(np.sum(100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1 - x[:-1]) ** 2))

    def backward(p, i):
        x = p["x"]
        g = np.zeros_like(x)
        t = x[1:] - x[:-1] ** 2
        g[:-1] += -400.0 * x[:-1] * t - 2 * (1 - x[:-1])
        g[1:] += 200.0 * t
        return {"x": g}

    def hvp(p, i, v):
        x, w = p["x"], v["x"]
        diag = np.zeros_like(x)
        diag[:-1] += 1200.0 * x[:-1] ** 2 - 400.0 * x[1:] + 2
        diag[1:] += 200.0
        off = -400.0 * x[:-1]
        out = diag * w
        out[:-1] += off * w[1:]
        out[1:] += off * w[:-1]
        if wrong is not None:
            out[wrong] += 0.3 * diag[wrong] * w[wrong]
        return {"x": out}

    params = {"x": np.random.default_rng(n).uniform(-1.0, 1.5, size=n)}
    return forward, backward, hvp, params


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def run(n: int, wrong: int | None) -> None:
    forward, backward, hvp, params = valley(n, wrong)
    gradient_only = []
    with_second = []
    for _ in range(2):  # alternate the two sides, twice
        gradient_only.append(timed(lambda: probe(forward, backward, params, hvp=hvp, second_order="off")))
        with_second.append(timed(lambda: probe(forward, backward, params, hvp=hvp)))
    report = with_second[-1][0]
    so = report.second_order
    base = min(w for _, w, _ in gradient_only)
    full = min(w for _, w, _ in with_second)
    cpu_base = min(c for _, _, c in gradient_only)
    cpu_full = min(c for _, _, c in with_second)
    directions = (so.backward_calls - 1) / 2
    bad = [b for b in so.blocks if b.status == "fail"]
    where = f", found {bad[0].bad_indices[:1]}" if bad else ""
    print(f"n={n:>7,}  {'one wrong' if wrong is not None else 'correct  '}  status {so.status.value:<5}"
          f"{where}  forward {report.evaluations:,} (second order {so.evaluations})  "
          f"backward {so.backward_calls:,} (= 1 + 2 x {directions:g} directions)  hvp {so.hessian_calls:,}  "
          f"second order {so.seconds:.3f} s  whole {full:.3f} s wall / {cpu_full:.3f} s CPU  "
          f"gradient only {base:.3f} s wall / {cpu_base:.3f} s CPU  ratio {full / base:.2f}")


if __name__ == "__main__":
    for n in (10, 1_000, 100_000):
        run(n, None)
        run(n, n // 3)
