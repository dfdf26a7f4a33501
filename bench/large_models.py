"""Large models with one wrong element, at default options, over many seeds.

Run by hand: ``python bench/large_models.py [--seeds 10] [--nets 3]``. Tanh networks
forecasting shop demand (20,000 to 100,000 params in their biggest tensor): for each network,
the correct backward (closed form; tests/test_large_models.py checks it against mpmath) and
one element of the biggest weight's gradient off by 1%, 0.1% and 20%, at an element whose
gradient is at least a tenth of the tensor's rms (a typical element, not a vanishing one).
Each is checked at seeds 0..SEEDS-1. Prints per case: failed and located / inconclusive /
missed (pass), evaluations, and for correct networks any tensor that is not pass or kink.

``--float32`` adds float32 rows: tanh regressions of sensor readings (a mean squared
error) whose params are float32, in two flavours: ``float32`` code computes in the type it
is handed (a float64 run is possible) and ``float32only`` code casts every array and its
loss to float32 (no wider run). Bugs of 1%, 0.1% and 20% in one element of the biggest weight.
``--only float32`` runs those rows alone.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import gradprobe

SHAPES = ((20, 1000, 4), (30, 1000, 4), (50, 1000, 2), (100, 1000, 8))


class Demand:
    """A tanh network forecasting shop demand; ``wrong`` = (flat index, relative error)."""

    def __init__(self, shape: tuple[int, int, int], seed: int, batch: int = 64) -> None:
        d, h, o = shape
        rng = np.random.default_rng(seed)
        self.params = {"hidden": {"W": rng.normal(size=(d, h)) / np.sqrt(d), "b": 0.1 * rng.normal(size=h)},
                       "out": {"W": rng.normal(size=(h, o)) / np.sqrt(h), "b": np.zeros(o)}}
        self.inputs = {"stores": rng.normal(size=(batch, d)), "demand": rng.normal(size=(batch, o))}
        self.wrong: tuple[int, float] | None = None

    def _hidden(self, p, i):
        return np.tanh(i["stores"] @ p["hidden"]["W"] + p["hidden"]["b"])

    def forward(self, p, i):
        out = self._hidden(p, i) @ p["out"]["W"] + p["out"]["b"]
        return 0.5 * float(np.mean((out - i["demand"]) ** 2))

    def exact(self, p, i):
        h = self._hidden(p, i)
        r = (h @ p["out"]["W"] + p["out"]["b"] - i["demand"]) / i["demand"].size
        dz = (r @ p["out"]["W"].T) * (1 - h**2)
        return {"hidden": {"W": i["stores"].T @ dz, "b": dz.sum(0)}, "out": {"W": h.T @ r, "b": r.sum(0)}}

    def backward(self, p, i):
        g = self.exact(p, i)
        if self.wrong is not None:
            k, rel = self.wrong
            g["hidden"]["W"].reshape(-1)[k] *= 1 + rel
        return g

    def plant(self, rel: float, seed: int) -> int:
        g = self.exact(self.params, self.inputs)["hidden"]["W"].reshape(-1)
        typical = np.flatnonzero(np.abs(g) >= 0.1 * np.sqrt(np.mean(g**2)))
        k = int(np.random.default_rng(seed).choice(typical))
        self.wrong = (k, rel)
        return k


class Sensors(Demand):
    """A tanh regression of sensor readings in float32; ``cast``: the forward and backward
    cast every array and the loss to float32 (no float64 run possible)."""

    def __init__(self, shape: tuple[int, int, int], seed: int, cast: bool, batch: int = 64) -> None:
        super().__init__(shape, seed, batch)
        self.cast = cast
        self.params = {layer: {k: v.astype(np.float32) for k, v in t.items()} for layer, t in self.params.items()}
        self.inputs = {k: v.astype(np.float32) for k, v in self.inputs.items()}

    def _arrays(self, p, i):
        if not self.cast:
            return p, i
        return ({layer: {k: np.asarray(v, dtype=np.float32) for k, v in t.items()} for layer, t in p.items()},
                {k: np.asarray(v, dtype=np.float32) for k, v in i.items()})

    def forward(self, p, i):
        p, i = self._arrays(p, i)
        out = self._hidden(p, i) @ p["out"]["W"] + p["out"]["b"]
        loss = 0.5 * np.mean((out - i["demand"]) ** 2)
        return np.float32(loss) if self.cast else float(loss)

    def exact(self, p, i):
        return Demand.exact(self, *self._arrays(p, i))


def rows(args) -> list[tuple[str, object, tuple[float | None, ...]]]:
    """(label, network builder, bugs) for each network the run checks."""
    out = []
    if args.only != "float32":
        for n, shape in enumerate(SHAPES[: args.nets]):
            out.append(("float64", lambda n=n, shape=shape: Demand(shape, seed=n), (None, 0.01, 0.001, 0.2)))
    if args.float32 or args.only == "float32":
        for n, shape in enumerate(SHAPES[: args.nets]):
            for cast in (False, True):
                out.append(("float32only" if cast else "float32",
                            lambda n=n, shape=shape, cast=cast: Sensors(shape, seed=n, cast=cast),
                            (None, 0.01, 0.001, 0.2)))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--nets", type=int, default=len(SHAPES))
    parser.add_argument("--float32", action="store_true", help="add the float32 rows")
    parser.add_argument("--only", choices=("float32",), default=None, help="the float32 rows alone")
    args = parser.parse_args()
    totals: dict[str, list[int]] = {}
    wall, cpu = time.perf_counter(), time.process_time()
    for n, (kind, build, bugs) in enumerate(rows(args)):
        for rel in bugs:
            net = build()
            k = net.plant(rel, n) if rel is not None else None
            counts = {"located": 0, "failed": 0, "inconclusive": 0, "pass": 0, "other": 0}
            statuses: dict[str, int] = {}
            others_seen: dict[str, int] = {}  # correct networks: tensors neither pass nor kink
            evaluations = []
            for seed in range(args.seeds):
                report = gradprobe.probe(net.forward, net.backward, net.params, net.inputs, seed=seed)
                evaluations.append(report.evaluations)
                t = report.tensor("hidden.W")
                statuses[t.status] = statuses.get(t.status, 0) + 1
                if rel is None:
                    bad = [s for s in report.tensors if s.status not in ("pass", "kink")]
                    counts["pass" if not bad else "other"] += 1
                    for s in bad:
                        others_seen[f"{s.name} {s.status}"] = others_seen.get(f"{s.name} {s.status}", 0) + 1
                    continue
                index = tuple(int(v) for v in np.unravel_index(k, net.params["hidden"]["W"].shape))
                others = [s.status for s in report.tensors if s.name != "hidden.W"]
                if any(s == "fail" for s in others):
                    counts["other"] += 1
                if t.status == "fail":
                    counts["located" if index in t.bad_indices else "failed"] += 1
                elif t.status == "inconclusive":
                    counts["inconclusive"] += 1
                else:
                    counts["pass"] += 1
            label = "correct" if rel is None else f"{rel:.1%} off"
            size = net.params["hidden"]["W"].size
            if rel is None:
                line = f"every tensor pass or kink {counts['pass']}/{args.seeds}"
                if others_seen:
                    line += " (" + ", ".join(f"{k} {v}" for k, v in sorted(others_seen.items())) + ")"
            else:
                line = (f"located {counts['located']}/{args.seeds}, failed elsewhere {counts['failed']}, "
                        f"inconclusive {counts['inconclusive']}, missed {counts['pass']}, "
                        f"another tensor failed {counts['other']}")
            key = f"{kind} {label}"
            good = counts["pass"] if rel is None else counts["located"]
            totals.setdefault(key, [0, 0])
            totals[key][0] += good
            totals[key][1] += args.seeds
            print(f"{kind:11s} hidden.W {size:6d} elements, {label:9s}: {line}; hidden.W "
                  + ", ".join(f"{s} {c}" for s, c in sorted(statuses.items()))
                  + f"; evaluations median {int(np.median(evaluations))}, max {max(evaluations)}", flush=True)
    print("as expected (correct: every tensor pass or kink; bug: failed and located): " +
          "; ".join(f"{k} {a}/{b}" for k, (a, b) in totals.items()) +
          f"; {time.perf_counter() - wall:.0f} s wall, {time.process_time() - cpu:.0f} s CPU")


if __name__ == "__main__":
    main()
