"""Sweep throughput against bare ``mujoco.rollout``, and the sweep's peak memory.

In one process:

1. the sweep end to end (design, physics draws, model building, simulation, features, objective and
   store writes) into a temporary store, timed by wall clock; peak resident memory of the process
   read after the last round (an upper bound: it covers the bare phases too, whose buffers are the
   size of the simulator's);
2. bare ``mujoco.rollout``: the same rollouts (same design, physics draws, hence the same models),
   horizon, time step, controls, initial states, thread count, ``mujoco.rollout.Rollout`` pool, and
   the same batching (sub-batches of ``SUB_BATCH``, MuJoCo's default chunk size within each). Models,
   controls and initial states are built outside the clock; only the ``rollout`` calls are timed, so
   "bare" is MuJoCo stepping alone, nothing of ours. The sweep may overlap its own Python work with
   the stepping (it does: :func:`gapgauge.sim.rollout.simulate_chunks`), which bare has none of;
   the two phases alternate in ``--rounds`` rounds so that load from others on a shared machine
   falls on both alike, and the median of the per-round ratios is printed beside the pooled ratio
   (a burst of load in one phase moves the pooled figure more than the median); process CPU time is
   reported too (its ratio is the overhead alone, whatever the load: the cost of our Python, not its
   overlap);
3. reading the rollouts back from a store (``Store.rollouts``) at ``--read-rows`` rows;
4. the callable-controller rows (:mod:`callable_throughput`, ``--callable-rollouts``; 0 skips): the sweep
   with the built-in controller's law written as a callable, at 500 Hz and 100 Hz, against the built-in.

Each scenario named with ``--scenario`` (any scenario; by default the bundled planar body's
push_recovery and the second body's biped_push, a 3-D biped with ten actuated joints) is measured in
turn. Prints both rates and their ratio per scenario; the last line is one JSON object with
``sweep_rollouts_per_s``, ``bare_rollouts_per_s``, ``ratio`` and ``peak_memory_mb`` (plus context) of the
first, and every scenario's under ``scenarios``. Targets: ratio >= 0.8, peak memory < 1 GiB.

    .venv/bin/python benchmarks/sweep_throughput.py               # 10^4 rollouts
    .venv/bin/python benchmarks/sweep_throughput.py --quick       # 500 rollouts, a smoke run
    .venv/bin/python benchmarks/sweep_throughput.py --scenario /path/to/your_robot.toml
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import mujoco
import mujoco.rollout
import numpy as np

# the callable-controller rows: a script beside this one (benchmarks/ is on the path when run as a script)
from callable_throughput import measure as measure_callable
from callable_throughput import print_rows as print_callable_rows

from gapgauge import load_scenario
from gapgauge.app.sweep import sweep
from gapgauge.records import RolloutBatch
from gapgauge.sim.controls import CONTROL_SPEC, STATE_SPEC, build_controls, control_size, initial_state
from gapgauge.sim.design import make_design
from gapgauge.sim.model import _load, build_models
from gapgauge.sim.physics import draw_physics
from gapgauge.sim.rollout import SUB_BATCH
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far, MB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def bare_seconds(scenario, n: int, seed: int, nthread: int) -> tuple[float, float]:
    """Wall and process CPU seconds of bare ``mujoco.rollout`` over the sweep's own models and inputs
    (``n`` rollouts of the sweep with this seed)."""
    base, _ = _load(scenario)
    nstep = scenario.task.nstep
    params = make_design(scenario, n, "sobol", seed)
    size = min(SUB_BATCH, n)
    control = np.empty((size, nstep, control_size(base)))
    state = np.empty((size, nstep, mujoco.mj_stateSize(base, STATE_SPEC)))
    sensordata = np.empty((size, nstep, base.nsensordata))
    datas = [mujoco.MjData(base) for _ in range(nthread)]
    pool: list[mujoco.MjModel] = []
    wall = cpu = 0.0
    with mujoco.rollout.Rollout(nthread=nthread if nthread > 1 else 0) as runner:
        for first in range(0, n, size):
            rows = np.arange(first, min(first + size, n))
            physics = draw_physics(scenario, seed, rows)
            pool = build_models(scenario, params[rows], physics, out=pool)
            ctrl = build_controls(scenario, params[rows], physics, out=control)
            x0 = initial_state(scenario, params[rows])
            m = len(rows)
            start, start_cpu = time.perf_counter(), time.process_time()
            runner.rollout(pool[:m], datas, x0, ctrl, control_spec=CONTROL_SPEC, skip_checks=True, nstep=nstep,
                           state=state[:m], sensordata=sensordata[:m])
            wall += time.perf_counter() - start
            cpu += time.process_time() - start_cpu
    return wall, cpu


def read_rate(scenario, rows: int, folder: Path) -> float:
    """Rows per second of ``Store.rollouts`` on a store of ``rows`` synthetic rollouts."""
    rng = np.random.default_rng(0)
    names = scenario.features.names
    with Store(folder / "read.sqlite") as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=rows, nominal=False)
        for first in range(0, rows, 5000):
            idx = np.arange(first, min(first + 5000, rows))
            m = len(idx)
            store.write_rollouts(run, RolloutBatch(
                idx, rng.random((m, scenario.dim)), rng.random((m, len(scenario.physics))),
                tuple(r.name for r in scenario.physics), np.array(["ok"] * m), np.array([""] * m),
                rng.random(m), {k: rng.random(m) for k in names}))
        start = time.perf_counter()
        batch = store.rollouts(scenario.content_hash)
        seconds = time.perf_counter() - start
    assert len(batch) == rows, (len(batch), rows)
    return rows / seconds


def measure(scenario, n: int, args: argparse.Namespace, read_rows: int) -> dict:
    """One scenario's figures: the sweep against bare ``mujoco.rollout`` in alternating rounds, the peak
    memory so far, and the store read rate (printed, and returned as the JSON-ready dict)."""
    # Rounds alternate the two phases so that load from other users of a shared machine falls on both
    # alike; each round is its own sweep run (seed = round), and bare runs that run's models and inputs.
    load_before = os.getloadavg()[0]
    rounds = max(1, min(args.rounds, n))
    sizes = [n // rounds + (r < n % rounds) for r in range(rounds)]
    sweep_wall = sweep_cpu = bare_wall = bare_cpu = 0.0
    round_ratios = []
    counts = {"ok": 0, "fell": 0, "diverged": 0}
    with tempfile.TemporaryDirectory() as tmp:
        for seed, size in enumerate(sizes):
            start_cpu = time.process_time()
            summary = sweep(scenario, size, seed=seed, store=Path(tmp) / "bench.sqlite", workers=args.workers,
                            chunk_size=args.chunk_size, progress=False)
            sweep_cpu += time.process_time() - start_cpu
            sweep_wall += summary.wall_seconds
            counts = {k: v + getattr(summary, k) for k, v in counts.items()}
            wall, cpu = bare_seconds(scenario, size, seed, args.workers)
            round_ratios.append(wall / summary.wall_seconds)
            bare_wall += wall
            bare_cpu += cpu
        peak = peak_rss_mb()  # before the read phase; bare's buffers are the size of the simulator's
        reads = read_rate(scenario, read_rows, Path(tmp))
    sweep_rate, bare = n / sweep_wall, n / bare_wall
    ratio = sweep_rate / bare
    cpu_ratio = bare_cpu / sweep_cpu
    print(f"scenario {scenario.name}: {n} rollouts of {scenario.task.nstep} steps, {len(scenario.joint_names)} "
          f"actuated joints, {'3-D' if scenario.lateral else 'planar'}, {args.workers} thread(s), "
          f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores")
    print(f"sweep end to end : {sweep_rate:8.1f} rollouts/s  ({sweep_wall:.1f} s in {rounds} round(s); "
          f"{counts['ok']} ok, {counts['fell']} fell, {counts['diverged']} diverged)")
    print(f"bare mujoco.rollout: {bare:6.1f} rollouts/s")
    print(f"ratio            : {ratio:8.3f}  (target >= 0.8; wall clock)")
    print(f"per-round ratios : {' '.join(f'{r:.3f}' for r in round_ratios)}  (median {np.median(round_ratios):.3f})")
    print(f"CPU-time ratio   : {cpu_ratio:8.3f}  (bare CPU s / sweep CPU s: the overhead alone, whatever the load)")
    print(f"peak memory      : {peak:8.1f} MB (target < 1024)")
    print(f"store read       : {reads:8.0f} rows/s ({read_rows} rows in {read_rows / reads:.2f} s)")
    return {
        "scenario": scenario.name, "joints": len(scenario.joint_names), "lateral": scenario.lateral,
        "sweep_rollouts_per_s": round(sweep_rate, 2), "bare_rollouts_per_s": round(bare, 2),
        "ratio": round(ratio, 4), "peak_memory_mb": round(peak, 1), "rollouts": n, "threads": args.workers,
        "nstep": scenario.task.nstep, "cpu_ratio": round(cpu_ratio, 4), "rounds": rounds,
        "median_round_ratio": round(float(np.median(round_ratios)), 4),
        "load_average_1min": [round(load_before, 2), round(os.getloadavg()[0], 2)],  # at start and end
        "store_read_rows_per_s": round(reads), "store_read_rows": read_rows,
        "date": datetime.now(timezone.utc).date().isoformat(),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rollouts", type=int, default=10_000, help="rollouts in each phase (default 10^4)")
    parser.add_argument("--quick", action="store_true", help="a small run: 500 rollouts, 10^4 rows read")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="simulation threads")
    parser.add_argument("--chunk-size", type=int, default=None, help="sweep chunk size (default the sweep's)")
    parser.add_argument("--read-rows", type=int, default=100_000, help="rows in the store-read phase")
    parser.add_argument("--rounds", type=int, default=8, help="alternations of the two phases (default 8)")
    parser.add_argument("--scenario", action="append", default=None,
                        help="scenario to measure (any scenario; repeat for several); default the bundled "
                             "push_recovery.toml (planar body) and biped_push.toml (the second body, 3-D)")
    parser.add_argument("--callable-rollouts", type=int, default=2_000,
                        help="rollouts per phase of the callable-controller rows (callable_throughput.py; 0 skips)")
    args = parser.parse_args()
    n = 500 if args.quick else args.rollouts
    read_rows = 10_000 if args.quick else args.read_rows
    paths = args.scenario or [str(ROOT / "scenarios" / name) for name in ("push_recovery.toml", "biped_push.toml")]
    figures = [measure(load_scenario(path), n, args, read_rows) for path in paths]
    extra = {}
    if args.callable_rollouts > 0:  # the callable controller against the built-in, bundled planar body
        extra["callable"] = measure_callable(200 if args.quick else args.callable_rollouts, args.workers,
                                             min(args.rounds, 4), args.chunk_size)
        print_callable_rows(extra["callable"])
    # the last line is one JSON object: the first scenario's figures at the top level (as before), and
    # every scenario's under "scenarios"
    print(json.dumps({**figures[0], "scenarios": figures, **extra}))


if __name__ == "__main__":
    main()
