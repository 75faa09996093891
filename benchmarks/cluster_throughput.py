"""Rollouts per hour per core on a Dask cluster of worker processes, against the local sweep.

    .venv/bin/python benchmarks/cluster_throughput.py                # 4,000 push_recovery rollouts each way
    .venv/bin/python benchmarks/cluster_throughput.py --quick        # 800

The same sweep (push_recovery, 3 s horizon, 1,500 steps of 2 ms, randomised physics) is run twice into
fresh stores in a temporary folder: locally with ``--workers`` MuJoCo threads, and through
``gapgauge.app.sweep.sweep(dask=address)`` on a ``distributed.LocalCluster`` of ``--workers`` worker
processes of one thread each (the layout a batch cluster runs: one process per core), the client writing
the store. Each rate is rollouts / wall seconds / cores; the last line is one JSON object. The figure a
lab plans a batch cluster with is the Dask one per core (times 3,600 s for an hour): a cluster's
cores are not shared with other work the way this machine's are, so expect at least this.
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

from gapgauge.app.sweep import sweep
from gapgauge.scenario import load_scenario

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rollouts", type=int, default=4000)
    parser.add_argument("--quick", action="store_true", help="800 rollouts")
    parser.add_argument("--workers", type=int, default=2, help="cores: local threads and Dask worker processes")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    n = 800 if args.quick else args.rollouts
    from distributed import Client, LocalCluster  # optional extra (cluster): imported only when run

    scenario = load_scenario(SCENARIO)
    rates = {}
    with tempfile.TemporaryDirectory() as scratch:
        start = time.perf_counter()
        local = sweep(scenario, n, seed=args.seed, store=Path(scratch) / "local.sqlite", workers=args.workers)
        rates["local"] = local.done / (time.perf_counter() - start) / args.workers
        with LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True, dashboard_address=None,
                          silence_logs=50) as cluster, Client(cluster) as client:
            client.wait_for_workers(args.workers, timeout=120)
            start = time.perf_counter()
            remote = sweep(scenario, n, seed=args.seed, store=Path(scratch) / "dask.sqlite", dask=client)
            rates["dask"] = remote.done / (time.perf_counter() - start) / args.workers
    for name, rate in rates.items():
        print(f"{name}: {rate:.1f} rollouts/s per core = {rate * 3600:,.0f} rollouts per core-hour", flush=True)
    print(json.dumps({
        "rollouts": n, "cores": args.workers, "horizon_s": scenario.task.horizon,
        "nstep": scenario.task.nstep,
        "local_per_core_s": round(rates["local"], 2), "dask_per_core_s": round(rates["dask"], 2),
        "dask_per_core_hour": round(rates["dask"] * 3600), "load_average": [round(v, 2) for v in os.getloadavg()],
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
    }))


if __name__ == "__main__":
    main()
