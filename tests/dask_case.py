"""Run by test_scale.py in a fresh interpreter: one check serially and on a local Dask
cluster of two worker processes; prints both reports as JSON."""

from __future__ import annotations

import json
import sys

import numpy as np


def forward(p, i):
    return float(np.sum(i["c"] * np.sin(p["w"])))


def backward(p, i):
    g = i["c"] * np.cos(p["w"])
    g[3] *= 1.1
    return {"w": g}


def main() -> None:
    import cloudpickle
    import distributed

    from gradprobe import probe
    from gradprobe.render.json import report_dict

    cloudpickle.register_pickle_by_value(sys.modules[__name__])
    rng = np.random.default_rng(0)
    params, inputs = {"w": rng.normal(size=40)}, {"c": rng.uniform(0.5, 1.5, size=40)}
    serial = probe(forward, backward, params, inputs)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            clustered = probe(forward, backward, params, inputs, executor=client.get_executor())
            workers = len(client.scheduler_info()["workers"])
    out = {"serial": report_dict(serial), "cluster": report_dict(clustered), "workers": workers}
    for report in (out["serial"], out["cluster"]):
        report["summary"].pop("seconds")
    print(json.dumps(out))


if __name__ == "__main__":
    main()
