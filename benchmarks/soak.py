"""Soak: sweeps killed with SIGKILL at random moments and concurrent ingests of stand-in logs (some of
them killed too) on one store for --minutes, then every interrupted command is run again to the end.

Prints the rows expected (from this script's own bookkeeping: every sweep job's planned count plus
K matched simulations per distinct trial) and the rows stored (counted with sqlite3), the interruptions
survived, SQLite's integrity check and `gapgauge store check`, and ends with one JSON line:
{"minutes", "interruptions", "rows_expected", "rows_stored", "rows_lost", "trials_expected", "trials_stored"}.

    .venv/bin/python benchmarks/soak.py --minutes 30
    .venv/bin/python benchmarks/soak.py --minutes 2 --keep /tmp/soak     # a short run, files kept

A scenario copy with a 1.2 s horizon keeps each sweep job short; jobs follow one another (seed 0, 1, ...)
so a long soak never needs a huge design. Random moments come from a seeded generator (--seed).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def gapgauge(*args) -> list[str]:
    return [sys.executable, "-m", "gapgauge.cli", *map(str, args)]


def count(store: Path, sql: str) -> int:
    if not store.exists():
        return 0
    conn = sqlite3.connect(store, timeout=60)
    try:
        return int(conn.execute(sql).fetchone()[0] or 0)
    except sqlite3.OperationalError:  # tables not created yet
        return 0
    finally:
        conn.close()


def make_project(folder: Path) -> Path:
    shutil.copytree(ROOT / "models", folder / "models")
    shutil.copytree(ROOT / "scenarios" / "standin", folder / "scenarios" / "standin")
    text = (ROOT / "scenarios" / "push_recovery.toml").read_text().replace("horizon = 3.0", "horizon = 1.2")
    path = folder / "scenarios" / "soak.toml"
    path.write_text(text)
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--minutes", type=float, default=30.0, help="how long to interrupt (then finish)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the kill and ingest moments")
    parser.add_argument("--job", type=int, default=1500, help="rollouts per sweep job")
    parser.add_argument("--chunk-size", type=int, default=64, help="rollouts per chunk (one transaction)")
    parser.add_argument("--mean-kill-s", type=float, default=15.0, help="mean time between sweep kills, s")
    parser.add_argument("--mean-ingest-s", type=float, default=20.0, help="mean time between ingests, s")
    parser.add_argument("--logs", type=int, default=12, help="stand-in logs in the pool")
    parser.add_argument("--matches", type=int, default=16, help="matched simulations per trial")
    parser.add_argument("--keep", type=Path, default=None, help="work in this folder and keep it")
    args = parser.parse_args()

    work = args.keep or Path(tempfile.mkdtemp(prefix="gapgauge-soak-"))
    work.mkdir(parents=True, exist_ok=True)
    scenario = make_project(work / "project")
    store = work / "soak.sqlite"
    rng = np.random.default_rng(args.seed)
    quiet = {"stdout": subprocess.DEVNULL, "stderr": subprocess.PIPE, "text": True}
    # the long-running processes write their stderr to a file: a pipe nobody reads could fill and stall them
    errors_log = open(work / "stderr.log", "a")  # noqa: SIM115 - open for the whole soak
    background = {"stdout": subprocess.DEVNULL, "stderr": errors_log}

    print(f"soak: {args.minutes:g} min on {store}; sweep jobs of {args.job} rollouts (chunks of {args.chunk_size}), "
          f"kills every ~{args.mean_kill_s:g} s, ingests every ~{args.mean_ingest_s:g} s", flush=True)
    made = subprocess.run(gapgauge("standin", scenario, "--profile", scenario.parent / "standin" / "close.toml",
                                   "--design", args.logs, "--out", work / "logs", "--seed", args.seed), **quiet)
    if made.returncode != 0:
        sys.exit(f"standin failed: {made.stderr}")
    pool = sorted((work / "logs").glob("*.csv"))

    def sweep_cmd(job: int) -> list[str]:
        return gapgauge("sweep", scenario, "--rollouts", args.job, "--seed", job, "--store", store,
                        "--chunk-size", args.chunk_size, "--workers", 1)

    def ingest_cmd(paths) -> list[str]:
        return gapgauge("ingest", scenario, *paths, "--store", store, "--matches", args.matches)

    interruptions = {"sweep": 0, "ingest": 0}
    failures: list[str] = []
    regressions = 0  # a count of stored rows that went down: a committed chunk lost
    job, sweep_proc, sweep_kill_at = 0, None, 0.0
    ingest_proc, ingest_kill_at, next_ingest = None, None, time.monotonic() + rng.exponential(args.mean_ingest_s)
    started_logs: set[Path] = set()
    cursor, last_rows = 0, 0
    start = time.monotonic()
    deadline = start + 60.0 * args.minutes
    last_report = start

    def kill(proc) -> bool:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
            return True
        return False

    while time.monotonic() < deadline:
        now = time.monotonic()
        if sweep_proc is None:
            sweep_proc = subprocess.Popen(sweep_cmd(job), **background)
            sweep_kill_at = now + rng.exponential(args.mean_kill_s)
        elif sweep_proc.poll() is not None:
            if sweep_proc.returncode != 0:
                failures.append(f"sweep job {job} exit {sweep_proc.returncode} (see {errors_log.name})")
            else:
                job += 1
            sweep_proc = None
        elif now >= sweep_kill_at:
            interruptions["sweep"] += kill(sweep_proc)
            sweep_proc = None
        if ingest_proc is None and now >= next_ingest:
            batch = [pool[(cursor + i) % len(pool)] for i in range(int(rng.integers(1, 3)))]
            cursor += len(batch)
            started_logs.update(batch)
            ingest_proc = subprocess.Popen(ingest_cmd(batch), **background)
            ingest_kill_at = now + rng.uniform(0.5, 6.0) if rng.random() < 0.4 else None
        elif ingest_proc is not None and ingest_proc.poll() is not None:
            if ingest_proc.returncode != 0:
                failures.append(f"ingest exit {ingest_proc.returncode} (see {errors_log.name})")
            ingest_proc, next_ingest = None, now + rng.exponential(args.mean_ingest_s)
        elif ingest_proc is not None and ingest_kill_at is not None and now >= ingest_kill_at:
            interruptions["ingest"] += kill(ingest_proc)
            ingest_proc, next_ingest = None, now + rng.exponential(args.mean_ingest_s)
        rows = count(store, "SELECT COUNT(*) FROM rollouts")
        regressions += rows < last_rows
        last_rows = max(rows, last_rows)
        if now - last_report > 60:
            print(f"  {(now - start) / 60:5.1f} min: {rows:,} rows, {job} job(s) done, interruptions {interruptions}",
                  flush=True)
            last_report = now
        time.sleep(0.1)

    # Finish: no more kills; the interrupted sweep job and every started ingest run to the end.
    for proc in (sweep_proc, ingest_proc):
        if proc is not None:
            proc.wait()
    finished = subprocess.run(sweep_cmd(job), **quiet)
    if finished.returncode != 0:
        failures.append(f"final sweep exit {finished.returncode}: {finished.stderr.strip()[-300:]}")
    jobs = job + 1
    completed = subprocess.run(ingest_cmd(sorted(started_logs)), **quiet) if started_logs else None
    if completed is not None and completed.returncode != 0:
        failures.append(f"final ingest exit {completed.returncode}: {completed.stderr.strip()[-300:]}")
    minutes = (time.monotonic() - start) / 60
    errors_log.close()

    trials_expected = len(started_logs)
    rows_expected = jobs * args.job + trials_expected * args.matches
    rows_stored = count(store, "SELECT COUNT(*) FROM rollouts")
    distinct = count(store, "SELECT COUNT(*) FROM (SELECT DISTINCT run_id, idx FROM rollouts)")
    trials_stored = count(store, "SELECT COUNT(*) FROM trials")
    conn = sqlite3.connect(store)
    verdict = conn.execute("PRAGMA integrity_check").fetchone()[0]
    conn.close()
    check = subprocess.run(gapgauge("store", "check", "--store", store), capture_output=True, text=True)

    print(f"sweep jobs: {jobs} x {args.job} rollouts; trials: {trials_expected} x {args.matches} matches")
    print(f"rows expected {rows_expected:,}, stored {rows_stored:,} ({distinct:,} distinct); "
          f"trials expected {trials_expected}, stored {trials_stored}")
    print(f"interruptions survived: {interruptions['sweep']} sweep kills, {interruptions['ingest']} ingest kills "
          f"(kill -9); stored-row count went down {regressions} time(s)")
    print(f"SQLite integrity_check: {verdict}; gapgauge store check: exit {check.returncode}")
    for failure in failures:
        print(f"FAILURE: {failure}")
    print(json.dumps({
        "minutes": round(minutes, 2), "interruptions": interruptions["sweep"] + interruptions["ingest"],
        "rows_expected": rows_expected, "rows_stored": rows_stored, "rows_lost": rows_expected - rows_stored,
        "trials_expected": trials_expected, "trials_stored": trials_stored,
    }))
    if args.keep is None:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
