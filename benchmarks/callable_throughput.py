"""Callable-controller throughput: the sweep with a controller of your own against the built-in controller.

The callable is the bundled template ``examples/servo_reaction.py``: the built-in servo-and-reaction law
written as a callable, so MuJoCo does the same work in both paths (same model, same actuators, same
trajectories up to the solver's warm start) and the difference is the closed loop's own cost: one
``mujoco.rollout`` call per control period with the state carried over, the observation read from the
sensor data, the callable itself and the checks of what it returns. Both run as a whole sweep end to end
(design, physics draws, models, simulation, features, objective, store writes) on the same rollouts,
threads and chunking, into fresh temporary stores; the phases alternate in ``--rounds`` rounds so that
load from others on a shared machine falls on all alike; the median of the per-round ratios and the
ratio of process CPU seconds (all threads) are printed beside the pooled ratio. Goals: ratio >= 0.5 at
a 500 Hz control rate (one call per 2 ms physics step), >= 0.8 at 100 Hz. A row for the example
``examples/com_feedback.toml`` (centre-of-mass feedback at 500 Hz, four observed channels) is printed
for information: its trajectories differ from the built-in's, so its ratio is not the closed loop's
cost alone.

Run alone or from ``sweep_throughput.py`` (which adds these rows to its own)::

    nice -n 10 .venv/bin/python benchmarks/callable_throughput.py             # 2,000 rollouts per phase
    nice -n 10 .venv/bin/python benchmarks/callable_throughput.py --quick     # 200, a smoke run
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from gapgauge import load_scenario
from gapgauge.app.sweep import sweep

ROOT = Path(__file__).resolve().parents[1]
RATES = (500.0, 100.0)
GOALS = {500.0: 0.5, 100.0: 0.8}


def phases(folder: Path) -> dict[str, Path]:
    """Scenario files of each phase in a copy of the bundled models/, scenarios/ and examples/."""
    for name in ("models", "scenarios", "examples"):
        shutil.copytree(ROOT / name, folder / name)
    out = {"builtin": folder / "scenarios" / "push_recovery.toml"}
    template = folder / "examples" / "servo_reaction.toml"
    for rate in RATES:
        path = template.with_name(f"servo_reaction_{int(rate)}hz.toml")
        path.write_text(f'extends = "{template.name}"\nname = "servo_reaction_{int(rate)}hz"\n\n'
                        f"[controller]\nrate_hz = {rate}\n", encoding="utf-8")
        out[f"callable_{int(rate)}hz"] = path
    out["com_feedback_500hz"] = folder / "examples" / "com_feedback.toml"
    return out


def measure(rollouts: int, workers: int, rounds: int, chunk_size: int | None = None) -> dict:
    """Rollouts per second of each phase and the ratios to the built-in controller."""
    rounds = max(1, min(rounds, rollouts))
    sizes = [rollouts // rounds + (r < rollouts % rounds) for r in range(rounds)]
    with tempfile.TemporaryDirectory() as tmp:
        files = phases(Path(tmp))
        scenarios = {name: load_scenario(path) for name, path in files.items()}
        wall = dict.fromkeys(files, 0.0)
        cpu = dict.fromkeys(files, 0.0)
        per_round: dict[str, list[float]] = {name: [] for name in files}
        for seed, size in enumerate(sizes):
            seconds = {}
            for name, scenario in scenarios.items():
                store = Path(tmp) / f"{name}_{seed}.sqlite"
                start_cpu = time.process_time()
                summary = sweep(scenario, size, seed=seed, store=store, workers=workers, chunk_size=chunk_size,
                                progress=False)
                cpu[name] += time.process_time() - start_cpu
                seconds[name] = summary.wall_seconds
                wall[name] += summary.wall_seconds
            for name in files:
                per_round[name].append(seconds["builtin"] / seconds[name])
    rate = {name: rollouts / wall[name] for name in files}
    return {
        "rollouts": rollouts, "threads": workers, "rounds": rounds,
        "nstep": scenarios["builtin"].task.nstep,
        "rollouts_per_s": {name: round(value, 2) for name, value in rate.items()},
        "ratio": {name: round(rate[name] / rate["builtin"], 4) for name in files if name != "builtin"},
        "median_round_ratio": {name: round(float(np.median(per_round[name])), 4) for name in files
                               if name != "builtin"},
        # process CPU seconds (every thread) of the built-in over this phase's: the cost, whatever the load
        "cpu_ratio": {name: round(cpu["builtin"] / cpu[name], 4) for name in files if name != "builtin"},
    }


def print_rows(figures: dict) -> None:
    """The human-readable rows of :func:`measure`'s figures."""
    rate, ratio, median, cpu = (figures[k] for k in ("rollouts_per_s", "ratio", "median_round_ratio", "cpu_ratio"))
    print(f"controller: built-in      : {rate['builtin']:8.1f} rollouts/s")
    for name in ratio:
        hz = float(name.rsplit("_", 1)[1][:-2])
        goal = f"goal >= {GOALS[hz]}" if name.startswith("callable") else "for information"
        print(f"controller: {name:<14}: {rate[name]:8.1f} rollouts/s  ratio {ratio[name]:.3f} "
              f"(median of rounds {median[name]:.3f}; CPU ratio {cpu[name]:.3f}; {goal})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rollouts", type=int, default=2_000, help="rollouts in each phase (default 2,000)")
    parser.add_argument("--quick", action="store_true", help="200 rollouts per phase, a smoke run")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="simulation threads")
    parser.add_argument("--rounds", type=int, default=4, help="alternations of the phases (default 4)")
    parser.add_argument("--chunk-size", type=int, default=None, help="sweep chunk size (default the sweep's)")
    args = parser.parse_args()
    load_before = os.getloadavg()[0]
    figures = measure(200 if args.quick else args.rollouts, args.workers, args.rounds, args.chunk_size)
    print(f"{figures['rollouts']} rollouts of {figures['nstep']} steps per phase, {args.workers} thread(s), "
          f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores")
    print_rows(figures)
    figures["load_average_1min"] = [round(load_before, 2), round(os.getloadavg()[0], 2)]
    figures["date"] = datetime.now(timezone.utc).date().isoformat()
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
