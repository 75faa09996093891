"""Stand-in logs at ingest: at least 200 logs across every profile of scenarios/standin/ and the seeds the tests
and benchmarks use, each ingested into one store; how many are accepted, flagged, placed in time, and how
close the onset estimate is to the stand-in's own (its clock is the trial's: the disturbance starts at the
scenario's ``[task].onset``).

For every (scenario, profile) pair that loads together (a profile names the physics of its scenario), and
every seed of ``SEEDS``, the stand-in writes ``--per-seed`` logs on a safe Sobol design; all are ingested with
``--matches`` matched simulations. Then each log is read again with its time column moved by a known amount
(a seeded draw in 0.05..1.5 s), so the onset must be estimated: the estimate's error against the known onset
is compared with one sample period plus the uncertainty it states.

Prints, per scenario, the counts and figures, and ends with one JSON line:
{"logs", "accepted", "failed", "flagged", "flags_by_kind", "placed_by_estimate", "moved_not_placed",
 "estimate_within_bound",
 "median_abs_error_ms", "max_abs_error_ms", "median_uncertainty_ms", "seconds"}.

    .venv/bin/python benchmarks/standin_logs.py                     # 7 seeds x 5 logs per pair
    .venv/bin/python benchmarks/standin_logs.py --per-seed 2        # quicker
"""

from __future__ import annotations

import argparse
import csv
import json
import shutil
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "src"))

from gapgauge.app.ingest import ingest  # noqa: E402
from gapgauge.errors import GapgaugeError  # noqa: E402
from gapgauge.logs import read_log  # noqa: E402
from gapgauge.scenario import load_scenario  # noqa: E402
from gapgauge.sim.standin import load_profile, run_standin  # noqa: E402
from gapgauge.store import Store  # noqa: E402
from gapgauge.units import UNITS  # noqa: E402

#: the stand-in seeds the tests and benchmarks use (tests/test_*.py, benchmarks/*.py)
SEEDS = (0, 1, 2, 3, 5, 11, 12)
SCENARIOS = ("push_recovery", "platform_shift", "biped_push")


def shifted_copy(src: Path, dst: Path, shift_s: float, time_column: str, time_factor: float) -> None:
    """The log with ``shift_s`` added to its time column (in the column's unit), and its sidecar."""
    with src.open(newline="") as fh:
        rows = list(csv.reader(fh))
    j = rows[0].index(time_column)
    for row in rows[1:]:
        row[j] = repr(float(row[j]) + shift_s / time_factor)
    with dst.open("w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    shutil.copy(src.with_suffix(".json"), dst.with_suffix(".json"))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--per-seed", type=int, default=5, help="logs per (scenario, profile, seed)")
    ap.add_argument("--matches", type=int, default=4, help="matched simulations per trial")
    ap.add_argument("--keep", type=Path, default=None, help="keep the logs and the store here")
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="standin_logs_"))
    work.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20260514)
    started = time.monotonic()
    totals: Counter = Counter()
    kinds: Counter = Counter()
    errors, bounds, uncertainties = [], [], []
    for name in SCENARIOS:
        try:
            scenario = load_scenario(ROOT / "scenarios" / f"{name}.toml")
        except (GapgaugeError, FileNotFoundError) as exc:
            print(f"{name}: skipped ({exc})")
            continue
        paths = []
        for profile in sorted((ROOT / "scenarios" / "standin").glob("*.toml")):
            try:
                load_profile(profile, scenario)
            except GapgaugeError:
                continue  # a profile of another scenario's body
            for seed in SEEDS:
                out = work / name / profile.stem / f"s{seed}"
                paths += run_standin(scenario, profile, design=args.per_seed, out_dir=out, seed=seed)
        with Store(work / f"{name}.sqlite") as store:
            summary = ingest(scenario, store, paths, matches=args.matches, seed=0, progress=False)
        accepted = summary.stored + summary.skipped_duplicates
        flagged = [f for f in accepted if f.flags]
        kinds.update(line.split(":")[0] + (" scale" if "scale" in line else "") for f in flagged for line in f.flags)
        totals.update(logs=len(paths), accepted=len(accepted), failed=len(summary.failed), flagged=len(flagged))
        for path, reason in summary.failed:
            print(f"  FAILED {path}: {reason}")
        hw = scenario.hardware
        placed = 0
        for i, path in enumerate(paths):
            shift = float(rng.uniform(0.05, 1.5))
            if not hw.columns:
                continue  # a bag-only scenario: the stand-in writes CSV
            moved = work / "moved" / name / f"{i:04d}.csv"
            moved.parent.mkdir(parents=True, exist_ok=True)
            shifted_copy(path, moved, shift, hw.time_column, UNITS[hw.time_unit][1])
            try:
                a = read_log(scenario, moved).alignment
            except GapgaugeError:  # the onset not placed: the CSV's own clock kept, which misses the disturbance
                totals.update(moved_refused=1)
                continue
            if a.source != "estimate":
                continue
            placed += 1
            error = a.onset_log_s - (scenario.task.onset + shift)
            errors.append(error)
            uncertainties.append(a.uncertainty_s)
            bounds.append(abs(error) <= 1.0 / hw.sample_rate_hz + a.uncertainty_s)
        totals.update(placed_by_estimate=placed)
        print(f"{name}: {len(paths)} logs, {len(accepted)} accepted, {len(summary.failed)} failed, "
              f"{len(flagged)} with flags; onset estimated on the moved copies of {placed}")
    err = np.abs(np.array(errors)) * 1e3
    result = {
        "logs": totals["logs"], "accepted": totals["accepted"], "failed": totals["failed"],
        "flagged": totals["flagged"], "flags_by_kind": dict(kinds.most_common()),
        "placed_by_estimate": totals["placed_by_estimate"], "moved_not_placed": totals["moved_refused"],
        "estimate_within_bound": int(np.sum(bounds)),
        "median_abs_error_ms": float(np.median(err)) if err.size else None,
        "max_abs_error_ms": float(np.max(err)) if err.size else None,
        "median_uncertainty_ms": float(np.median(uncertainties) * 1e3) if uncertainties else None,
        "seconds": round(time.monotonic() - started, 1),
    }
    print(f"flags by channel: {dict(kinds.most_common())}")
    print(f"onset estimate within one sample period + its stated uncertainty: {result['estimate_within_bound']} of "
          f"{result['placed_by_estimate']}; |error| median {result['median_abs_error_ms']} ms, max "
          f"{result['max_abs_error_ms']} ms; stated uncertainty median {result['median_uncertainty_ms']} ms")
    print(json.dumps(result))
    if args.keep is None:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
