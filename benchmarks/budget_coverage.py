"""How often the realised trials-to-target of a tuning run on the stand-in robot is within the budget's P80.

For each run (seeded; the stand-in profiles of ``scenarios/standin/`` in turn):

1. a store with the cached sweep of ``push_recovery`` (one sweep, reused by every run);
2. 3-5 first trials on the stand-in robot (``run_standin`` on a safe Sobol design, then ``ingest``);
3. the prior (``gapgauge.app.prior.current_prior``, as the budget job takes it) and the budget's P80
   on a fixed candidate set of the safe bounds (``gapgauge.compare.budget.plan_from_prior``, the core
   of ``gapgauge budget``);
4. the realised tuning run: the same policy, from the same prior, against the stand-in's truth on the
   same candidates (``simulate`` at the profile's physics, which is what the stand-in runs; without
   the logger's sensor noise), up to ``max_trials`` trials. A trial falls when the truth's rollout
   fell (its margin of stability is passed with that sign). The target is defined on the truth as the
   budget defines it on a draw: 95% of the way from the median of the standing candidates to their
   best (the candidate set is the dense design, cached per profile).

A run is covered when the realised trials-to-target is at most the budget's P80; a P80 of ">T" (not
reached by 80% of the draws within T) covers every realised value up to T, and a run that is beyond T
on both counts is counted as covered and reported as ``both_beyond_T``. Last line: one JSON object
``{"runs", "p80_coverage", ...}``.

    .venv/bin/python benchmarks/budget_coverage.py [--quick] [--runs N]
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from gapgauge.app.ingest import ingest
from gapgauge.app.prior import current_prior
from gapgauge.app.sweep import sweep
from gapgauge.compare.budget import beliefs_from_prior, candidate_set, draw_targets, plan_from_prior, run_policy
from gapgauge.scenario import load_scenario
from gapgauge.sim.rollout import simulate
from gapgauge.sim.standin import load_profile, run_standin
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"
PROFILES = ("close", "heavy_slippery", "weak_laggy")
CACHE = ROOT / "benchmarks" / "cache" / "budget_coverage"
CANDIDATE_SEED = 20240
MAX_TRIALS = 20
TARGET_FRACTION = 0.95


def cached_sweep(scenario, rollouts: int) -> Path:
    path = CACHE / f"sweep_{rollouts}.sqlite"
    if not path.exists():
        CACHE.mkdir(parents=True, exist_ok=True)
        partial = path.with_suffix(".partial")
        store = Store(partial)
        sweep(scenario, rollouts, store=store, seed=0, workers=2)
        store.close()
        partial.rename(path)
    return path


def cached_truth(scenario, profile: str, candidates: np.ndarray) -> dict[str, np.ndarray]:
    """The stand-in truth on the candidates: objective, fell, margin of stability (npz cache)."""
    path = CACHE / f"truth_{profile}_{candidates.shape[0]}_{CANDIDATE_SEED}.npz"
    if path.exists():
        data = dict(np.load(path))
        if np.array_equal(data["candidates"], candidates):
            return data
    prof = load_profile(ROOT / "scenarios" / "standin" / f"{profile}.toml", scenario)
    params = scenario.from_unit(candidates)
    physics = np.tile(prof.physics_row(scenario), (params.shape[0], 1))
    batch = simulate(scenario, params, physics, nthread=2)
    status = np.asarray(batch.status)
    margin = np.asarray(batch.features["margin_of_stability"], dtype=float)
    data = {
        "candidates": candidates,
        "objective": np.asarray(batch.objective, dtype=float),
        "fell": status != "ok",
        "margin": margin,
    }
    CACHE.mkdir(parents=True, exist_ok=True)
    np.savez(path, **data)
    return data


def one_run(scenario, sweep_path: Path, profile: str, seed: int, candidates: np.ndarray, draws: int,
            truth: dict[str, np.ndarray], work: Path) -> dict:
    store_path = work / f"run_{seed}.sqlite"
    shutil.copyfile(sweep_path, store_path)
    store = Store(store_path)
    n_first = 3 + seed % 3
    logs = run_standin(scenario, ROOT / "scenarios" / "standin" / f"{profile}.toml", design=n_first,
                       out_dir=work / f"logs_{seed}", seed=seed)
    ingest(scenario, store, logs, matches=4, seed=seed)
    prior = current_prior(scenario, store, seed=seed)
    plan = plan_from_prior(prior, candidates=candidates, seed=seed, max_trials=MAX_TRIALS, draws=draws,
                           target_fraction=TARGET_FRACTION)
    store.close()
    # the realised run: the policy from the same prior, observing the stand-in truth
    fell = truth["fell"]
    margin = np.where(np.isfinite(truth["margin"]), truth["margin"], -1.0)
    margin = np.where(fell, np.minimum(margin, -1e-3), np.maximum(margin, 1e-3))
    objective = np.where(fell, np.nan, truth["objective"])
    target = draw_targets(np.where(fell, np.inf, objective)[None], margin[None], TARGET_FRACTION, None)
    beliefs = beliefs_from_prior(prior, candidates, seed)
    realised = run_policy(
        np.where(fell, np.inf, objective)[None], margin[None], target, beliefs.objective,
        beliefs.margin, max_trials=MAX_TRIALS, objective_noise_sd=0.0, margin_noise_sd=0.0, rng=seed,
    )
    reached = int(realised.trials_to_target[0])
    p80 = plan.with_prior.p80
    realised_value = reached if reached <= MAX_TRIALS else None
    covered = p80 is None or (realised_value is not None and realised_value <= p80)
    return {
        "profile": profile, "seed": seed, "first_trials": n_first, "p80": p80, "cold_p80": plan.cold_start.p80,
        "reached_fraction": plan.with_prior.reached_fraction, "realised": realised_value,
        "realised_falls": int(realised.falls[0]), "covered": bool(covered),
        "both_beyond_T": p80 is None and realised_value is None,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sweep, candidate set and draws")
    parser.add_argument("--runs", type=int, default=None, help="tuning runs (at least 10)")
    args = parser.parse_args()
    runs = max(10, args.runs or (10 if args.quick else 12))
    rollouts, n_candidates, draws = (1000, 512, 64) if args.quick else (2000, 1024, 128)
    scenario = load_scenario(SCENARIO)
    started = time.perf_counter()
    sweep_path = cached_sweep(scenario, rollouts)
    candidates = candidate_set(scenario, n_candidates, CANDIDATE_SEED)
    truths = {p: cached_truth(scenario, p, candidates) for p in PROFILES}
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(runs):
            profile = PROFILES[seed % len(PROFILES)]
            row = one_run(scenario, sweep_path, profile, seed, candidates, draws, truths[profile], Path(tmp))
            results.append(row)
            print(json.dumps(row), file=sys.stderr, flush=True)
    coverage = float(np.mean([r["covered"] for r in results]))
    print(json.dumps({
        "runs": runs, "p80_coverage": coverage,
        "both_beyond_T": int(sum(r["both_beyond_T"] for r in results)),
        "max_trials": MAX_TRIALS, "draws": draws, "candidates": n_candidates, "sweep_rollouts": rollouts,
        "seconds": round(time.perf_counter() - started, 1),
    }))


if __name__ == "__main__":
    main()
