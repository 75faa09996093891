"""The prior at lab scale: the store, the fit, held-out accuracy and propose after a new trial, 10^5 to 10^6 rollouts.

    .venv/bin/python benchmarks/prior_scale.py                       # 10^5 real rollouts (seed 0)
    .venv/bin/python benchmarks/prior_scale.py --rollouts 200000     # 2 x 10^5 real rollouts (seeds 0 and 1)
    .venv/bin/python benchmarks/prior_scale.py --rollouts 1000000    # 10^6 rows replicated from the real ones
    .venv/bin/python benchmarks/prior_scale.py --quick               # 5,000 real rollouts, a few minutes

Real rollouts: sweeps of push_recovery of ``--per-run`` (10^5) rollouts with seeds 0, 1, ... run by
:func:`gapgauge.app.sweep.sweep` into ``benchmarks/cache/push_recovery.sqlite`` (resumable: a second
run reuses them; 10^5 take 15-30 minutes on the shared 2-core machine).

Replicated rows (``--rollouts`` above ``--max-real``, 2 x 10^5 by default). A real 10^6 sweep takes about
2.5 hours on 2 cores, so the 10^6 store is written through the store's own API (``Store.start_run`` /
``write_rollouts``, chunks of 10^4) into ``benchmarks/cache/push_recovery_replicated_<N>.sqlite``: row
``i`` copies the outcome (status, objective, features) of real training rollout ``perm[i mod n]``, its
parameters jittered by N(0, 0.01^2) in the unit cube (reflected at the faces), its physics drawn fresh
(``draw_physics(scenario, 7, i)``). The run's design is ``"replicated"`` and its config says all this; so
does the output. Such rows time the store and the fit honestly; their accuracy is only indicative,
the accuracy at scale is the real 2 x 10^5 sweep's.

Steps, each printed:

1. The store: file size per rollout, ``Store.info()`` and the ``gapgauge info`` command (a subprocess:
   Python start-up and imports included), and the read of what the prior needs (``read_prior_data``).
2. Held out: ``--test`` standing rollouts of the seed-0 run, chosen as issue 5's benchmark chose them
   (a permutation seeded by ``--seed``), the same set at every size and never in any training set.
3. ``fit_prior`` (objective and fall model; ``--inducing`` inducing points, default ``fit_prior``'s: 300,
   or 600 above 10^5 rollouts) on every other row, for each of ``--fit-seeds``, timed;
   held-out RMSE and R^2 of its simulation level against the held-out rollouts' objective.
4. Propose after a new trial, on a scratch copy of the store: three synthetic trials (real standing
   rollouts of the held-out set, objective + 0.1; labelled synthetic), the prior job (read, full fit,
   store), one more trial, then the propose job as the command runs it (open, check the sweep, refit the
   hardware level, propose, store); timed. Peak memory (``ru_maxrss``) is read after this step.
5. With ``--compare-inducing 300,600,1000``: the objective's simulation level alone (as the prior fits it:
   hyperparameters on a 600-rollout subsample, the posterior on every training row) with each number of
   inducing points, timed, with its held-out RMSE and R^2: the inducing-point choice, measured.
6. Issue 5's comparison, unchanged: :class:`gapgauge.compare.sparse.SparseGP` (Titsias 2009) against
   scikit-learn's exact ``GaussianProcessRegressor`` on the largest random subset that fits in the same
   wall time (a pilot on 500 points, the n^3 cost, a memory cap), held-out RMSE of both.

The last line printed is one JSON object with every figure. Targets (issues 5 and 19): the sparse fit
at 10^5 within 60 s with RMSE no worse than the exact GP; at 10^6: info within 2 s, the read within
10 s, the prior fit within 120 s with held-out accuracy no worse than at 10^5, peak memory under
2 GiB, propose after a new trial within 2 s.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from gapgauge.app.prior import fit_prior as fit_prior_job
from gapgauge.app.prior import read_prior_data
from gapgauge.app.propose import propose as propose_job
from gapgauge.app.sweep import sweep
from gapgauge.compare.multifidelity import HYPERPARAMETER_SUBSAMPLE
from gapgauge.compare.prior import fit_prior, prior_data
from gapgauge.compare.sparse import SparseGP
from gapgauge.records import RolloutBatch, TrialRecord
from gapgauge.scenario import load_scenario
from gapgauge.sim.physics import draw_physics
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"
CACHE = Path(__file__).resolve().parent / "cache"
PILOT_N = 500
JITTER_SD = 0.01  # unit cube
REPLICA_PHYSICS_SEED = 7
WRITE_CHUNK = 10_000
HARDWARE_OFFSET = 0.1  # objective units added to the synthetic trials
ISSUE5_INDUCING = 300  # issue 5's sparse-vs-exact comparison, unchanged


def exact_gp(X: np.ndarray, y: np.ndarray, seed: int) -> tuple[GaussianProcessRegressor, float]:
    dim = X.shape[1]
    kernel = ConstantKernel(1.0) * Matern(length_scale=np.full(dim, np.sqrt(dim / 6)), nu=2.5) + WhiteKernel(0.1)
    model = GaussianProcessRegressor(kernel, normalize_y=True, n_restarts_optimizer=0, random_state=seed)
    start = time.perf_counter()
    # the same single BLAS thread as ours, so both sides see the same machine
    with threadpool_limits(limits=1, user_api="blas"):
        model.fit(X, y)
    return model, time.perf_counter() - start


def rmse(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.sqrt(np.mean((a - b) ** 2)))


def r_squared(predicted: np.ndarray, y: np.ndarray) -> float:
    """Coefficient of determination 1 - SS_res / SS_tot (sklearn.metrics.r2_score's definition)."""
    return float(1.0 - np.sum((y - predicted) ** 2) / np.sum((y - y.mean()) ** 2))


def peak_memory_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux


def say(text: str) -> None:
    print(text, flush=True)


def real_sweeps(scenario, store_path: Path, total: int, per_run: int) -> list:
    """Sweeps of ``per_run`` rollouts (seeds 0, 1, ...) holding ``total`` real rollouts in all."""
    summaries = []
    for seed in range(int(np.ceil(total / per_run))):
        started = time.perf_counter()
        summary = sweep(scenario, min(per_run, total - seed * per_run), seed=seed, store=store_path)
        say(f"real sweep seed {seed}: {summary.done} rollouts ({summary.ran_now} simulated now, "
            f"{time.perf_counter() - started:.0f} s); ok {summary.ok}, fell {summary.fell}, "
            f"diverged {summary.diverged}")
        summaries.append(summary)
    return summaries


def held_out_keys(batch: RolloutBatch, run_id: int, n_test: int, seed: int) -> tuple[set[tuple[int, int]], np.ndarray]:
    """(run, index) of the held-out standing rollouts of run ``run_id`` and the rows of its other standing
    rollouts in the permuted order issue 5's benchmark trained on (its choice: one seeded permutation)."""
    mask = (batch.run_ids == run_id) & (batch.status == "ok") & np.isfinite(batch.objective)
    rows = np.flatnonzero(mask)
    order = np.random.default_rng(seed).permutation(rows.size)
    n_test = min(n_test, rows.size // 5)
    chosen = rows[order[:n_test]]
    return {(int(batch.run_ids[i]), int(batch.indices[i])) for i in chosen}, rows[order[n_test:]]


def split(batch: RolloutBatch, keys: set[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
    held = np.array([(int(r), int(i)) in keys for r, i in zip(batch.run_ids, batch.indices, strict=True)])
    return ~held, held


def build_replicated(scenario, source: RolloutBatch, target: Path, total: int, source_store: Path) -> int:
    """Write ``total`` replicated rows (module docstring) from ``source`` into ``target``; resumable."""
    rng = np.random.default_rng(REPLICA_PHYSICS_SEED)
    perm = rng.permutation(len(source))
    config = {
        "synthetic": "replicated rows, not simulated: timing of the store and the fit at scale only",
        "source_store": str(source_store), "source_rows": len(source),
        "source_runs": sorted({int(r) for r in source.run_ids}),
        "outcome": "status, objective and features copied from real rollout perm[i mod source_rows]",
        "parameter_jitter_sd_unit_cube": JITTER_SD,
        "physics": f"fresh draws, draw_physics(seed={REPLICA_PHYSICS_SEED})",
    }
    U_source = scenario.to_unit(source.params)
    with Store(target) as db:
        run = db.start_run("sweep", scenario, seed=REPLICA_PHYSICS_SEED, design="replicated", planned=total,
                           nominal=False, config=config)
        done = set(db.done_indices(run).tolist())
        for start in range(0, total, WRITE_CHUNK):
            indices = np.arange(start, min(total, start + WRITE_CHUNK))
            if all(int(i) in done for i in (indices[0], indices[-1])):
                continue
            rows = perm[indices % len(source)]
            jitter = np.random.default_rng([REPLICA_PHYSICS_SEED, start]).normal(0.0, JITTER_SD, U_source[rows].shape)
            U = 1.0 - np.abs(1.0 - np.abs(U_source[rows] + jitter))  # reflected into [0, 1]
            db.write_rollouts(run, RolloutBatch(
                indices=indices, params=scenario.from_unit(U),
                physics=draw_physics(scenario, REPLICA_PHYSICS_SEED, indices), physics_names=source.physics_names,
                status=source.status[rows], reason=source.reason[rows], objective=source.objective[rows],
                features={k: v[rows] for k, v in source.features.items()}))
        db.finish_run(run)
    return run


def synthetic_trials(scenario, batch: RolloutBatch, held: np.ndarray, count: int) -> list[TrialRecord]:
    """Trials made of held-out real standing rollouts inside the safe bounds (objective + offset)."""
    safe = scenario.bounds(safe=True)
    inside = held & (batch.status == "ok") & np.all((batch.params >= safe[:, 0]) & (batch.params <= safe[:, 1]), 1)
    rows = np.flatnonzero(inside)[:count]
    if rows.size < count:  # the safe box is small: take the held-out rollouts nearest its centre, clipped
        centre = scenario.to_unit(safe.mean(1)[None])[0]
        candidates = np.flatnonzero(held & (batch.status == "ok"))
        near = candidates[np.argsort(((scenario.to_unit(batch.params[candidates]) - centre) ** 2).sum(1))]
        rows = near[:count]
    trials = []
    for n, i in enumerate(rows):
        x = np.clip(batch.params[i], safe[:, 0], safe[:, 1])
        trials.append(TrialRecord(
            scenario_hash=scenario.content_hash, source_path=f"prior_scale_trial_{n}.csv", sha256=f"prior-scale-{n}",
            params=scenario.params_to_mapping(x), robot_id="benchmark (synthetic)",
            recorded_at="2026-12-02T00:00:00+00:00", outcome="stood", synthetic=True,
            notes=f"synthetic: real simulated rollout {int(batch.run_ids[i])}/{int(batch.indices[i])}, objective + "
                  f"{HARDWARE_OFFSET}",
            features={"margin_of_stability": float(batch.features["margin_of_stability"][i]), "fell": 0.0},
            objective=float(batch.objective[i] + HARDWARE_OFFSET)))
    return trials


def store_figures(scenario, store_path: Path) -> tuple[dict, object]:
    size = sum(p.stat().st_size for p in store_path.parent.glob(store_path.name + "*") if p.suffix != ".bak")
    with Store(store_path) as store:
        start = time.perf_counter()
        info = store.info()
        info_seconds = time.perf_counter() - start
        start, cpu = time.perf_counter(), time.process_time()
        data = read_prior_data(scenario, store)
        read_seconds, read_cpu = time.perf_counter() - start, time.process_time() - cpu
    start = time.perf_counter()
    command = subprocess.run([sys.executable, "-m", "gapgauge.cli", "info", "--store", str(store_path)],
                             capture_output=True, text=True)
    command_seconds = time.perf_counter() - start
    total = info["rollouts"]["total"]
    out = {"store_rollouts": total, "store_bytes": size, "bytes_per_rollout": round(size / total, 1),
           "info_seconds": round(info_seconds, 3), "info_command_seconds": round(command_seconds, 2),
           "info_command_ok": command.returncode == 0, "read_prior_data_seconds": round(read_seconds, 2),
           "read_prior_data_cpu_seconds": round(read_cpu, 2),
           "read_sim_rows": int(data.y_sim.size), "read_margin_rows": int(data.margin_sim.size)}
    say(f"store: {total:,} rollouts, {size / 1e6:.0f} MB ({size / total:.0f} bytes per rollout); info() "
        f"{info_seconds:.3f} s, `gapgauge info` {command_seconds:.2f} s (Python start-up and imports included); "
        f"read_prior_data {read_seconds:.2f} s ({read_cpu:.2f} s CPU; {data.y_sim.size:,} standing + "
        f"{data.margin_sim.size:,} margins)")
    return out, data


def propose_after_trial(scenario, store_path: Path, trials: list[TrialRecord], args) -> dict:
    with tempfile.TemporaryDirectory(dir=CACHE) as scratch:
        copy = Path(scratch) / "copy.sqlite"
        with sqlite3.connect(store_path) as src, sqlite3.connect(copy) as dst:
            src.backup(dst)  # a consistent copy: the benchmark adds trials and priors to it, not to the cache
        with Store(copy) as store:
            for trial in trials[:-1]:
                store.add_trial(trial)
        start = time.perf_counter()
        prior = fit_prior_job(scenario, copy, seed=args.seed, max_inducing=args.inducing)
        job_seconds = time.perf_counter() - start
        say(f"prior job (read + full fit + store, {len(trials) - 1} trials): {job_seconds:.1f} s")
        with Store(copy) as store:
            store.add_trial(trials[-1])
        start, cpu = time.perf_counter(), time.process_time()
        proposals = propose_job(scenario, copy, count=1, max_fall_risk=args.max_fall_risk, seed=args.seed)
        propose_seconds, propose_cpu = time.perf_counter() - start, time.process_time() - cpu
        with Store(copy) as store:
            after = store.load_result(type(prior), scenario.content_hash)
        say(f"propose after a new trial: {propose_seconds:.2f} s ({propose_cpu:.2f} s CPU; simulation level "
            f"reused: {after.simulation_reused}, "
            f"{after.n_hardware} trials; proposal {proposals.proposals[0].params})")
    return {"prior_job_seconds": round(job_seconds, 2), "propose_after_trial_seconds": round(propose_seconds, 3),
            "propose_after_trial_cpu_seconds": round(propose_cpu, 3),
            "propose_reused_simulation": bool(after.simulation_reused), "trials": len(trials)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rollouts", "--n", type=int, default=100_000, help="rollouts (default 10^5)")
    parser.add_argument("--quick", action="store_true", help="same as --rollouts 5000 --per-run 5000")
    parser.add_argument("--per-run", type=int, default=100_000, help="rollouts per real sweep (one seed each)")
    parser.add_argument("--max-real", type=int, default=200_000, help="above this, rows are replicated")
    parser.add_argument("--test", type=int, default=2000, help="held-out standing rollouts")
    parser.add_argument("--inducing", type=int, default=None,
                        help="inducing points of the prior (default: fit_prior's, 300 or 600 above 10^5 rollouts)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--exact-memory-gb", type=float, default=1.5,
                        help="cap on scikit-learn's gradient tensor (n^2 x 15 doubles)")
    parser.add_argument("--max-fall-risk", type=float, default=0.05,
                        help="fall-risk limit of the timed propose (the command's default)")
    parser.add_argument("--store", type=Path, default=None, help="store of the real sweeps (default benchmarks/cache/)")
    parser.add_argument("--fit-seeds", type=lambda text: [int(v) for v in text.split(",")], default=[0],
                        help="seeds of the held-out fit (the accuracy is their mean; the first is timed)")
    parser.add_argument("--compare-inducing", type=lambda text: [int(v) for v in text.split(",")], default=[],
                        help="also fit the objective's simulation level with each of these inducing counts")
    args = parser.parse_args()
    n, per_run = (5000, 5000) if args.quick else (args.rollouts, args.per_run)
    replicated = n > args.max_real
    scenario = load_scenario(SCENARIO)
    CACHE.mkdir(exist_ok=True)
    real_path = args.store or CACHE / "push_recovery.sqlite"
    summaries = real_sweeps(scenario, real_path, min(n, args.max_real), per_run)
    with Store(real_path) as store:
        real = store.rollouts(scenario.content_hash, kinds=("sweep",), run_ids=[s.run_id for s in summaries])
    keys, first_run_rows = held_out_keys(real, summaries[0].run_id, args.test, args.seed)
    train, held = split(real, keys)
    # issue 5's comparison trains on the first run's standing rollouts in its permuted order, then the others
    others = np.flatnonzero(train & (real.status == "ok") & np.isfinite(real.objective)
                            & (real.run_ids != summaries[0].run_id))
    issue5_rows = np.concatenate([first_run_rows, others])
    X5, y5 = scenario.to_unit(real.params[issue5_rows]), real.objective[issue5_rows]
    n_first_run = first_run_rows.size + len(keys)
    params_test, X_test, y_test = real.params[held], scenario.to_unit(real.params[held]), real.objective[held]
    trials = synthetic_trials(scenario, real, held, 4)
    say(f"real rollouts: {len(real):,} in runs {[s.run_id for s in summaries]}; held out {int(held.sum())} standing "
        f"rollouts of run {summaries[0].run_id}; objective sd {np.std(real.objective[real.status == 'ok']):.4g}")
    if replicated:
        store_path = CACHE / f"push_recovery_replicated_{n}.sqlite"
        say(f"REPLICATED ROWS: {n:,} rows written through Store.write_rollouts from {int(train.sum()):,} real "
            f"training rollouts (outcomes copied, parameters jittered by N(0, {JITTER_SD}^2) in the unit cube, "
            f"physics drawn fresh), into {store_path.name}; not simulated")
        start = time.perf_counter()
        build_replicated(scenario, real.subset(train), store_path, n, real_path)
        say(f"replicated store ready in {time.perf_counter() - start:.0f} s "
            f"(peak memory so far {peak_memory_mb():.0f} MB)")
        training = None
    else:
        store_path = real_path
        training = real.subset(train)
    del real
    figures, data = store_figures(scenario, store_path)
    if training is not None:  # the real store holds the held-out rows too: fit on the others
        data = prior_data(scenario, training, [])
        del training
    fits = []
    for fit_seed in args.fit_seeds:
        start, cpu = time.perf_counter(), time.process_time()
        prior = fit_prior(scenario, data, seed=fit_seed, max_inducing=args.inducing,
                          progress=lambda stage, done, total, t0=start: say(f"  {stage} ({done}/{total}) "
                                                                            f"{time.perf_counter() - t0:.1f} s"))
        seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
        predicted = prior.predict_simulation(params_test, return_std=False)
        fits.append({"seed": fit_seed, "seconds": round(seconds, 2), "cpu_seconds": round(cpu, 2),
                     "rmse": round(rmse(predicted, y_test), 5), "r2": round(r_squared(predicted, y_test), 5)})
        say(f"fit_prior (seed {fit_seed}, {prior.max_inducing} inducing points) on {prior.n_sim:,} standing + "
            f"{prior.n_sim_fall_model:,} margins: "
            f"{seconds:.1f} s ({cpu:.1f} s CPU); held-out RMSE {fits[-1]['rmse']:.4f}, R^2 {fits[-1]['r2']:.4f} "
            f"({y_test.size} rollouts)")
    fit_seconds_prior, prior_rmse = fits[0]["seconds"], float(np.mean([f["rmse"] for f in fits]))
    prior_r2 = float(np.mean([f["r2"] for f in fits]))
    say(f"held-out over {len(fits)} fit seed(s): RMSE {prior_rmse:.4f}, R^2 {prior_r2:.4f}")
    X_train, y_train, prior_inducing = data.X_sim, data.y_sim, prior.max_inducing
    del data, prior
    figures.update(propose_after_trial(scenario, store_path, trials, args))
    peak = peak_memory_mb()
    say(f"peak memory (read, fit, propose): {peak:.0f} MB")

    inducing = {}
    for m in args.compare_inducing:
        start = time.perf_counter()
        level = SparseGP(n_inducing=m, n_subsample=HYPERPARAMETER_SUBSAMPLE,
                         n_inducing_subsample=HYPERPARAMETER_SUBSAMPLE, random_state=args.seed).fit(X_train, y_train)
        seconds = time.perf_counter() - start
        predicted = level.predict(X_test)
        inducing[m] = {"seconds": round(seconds, 2), "rmse": round(rmse(predicted, y_test), 5),
                       "r2": round(r_squared(predicted, y_test), 5)}
        say(f"simulation level with {m} inducing points on {y_train.size:,}: {seconds:.1f} s, held-out RMSE "
            f"{inducing[m]['rmse']:.4f}, R^2 {inducing[m]['r2']:.4f}")

    if replicated:  # no first run in the replicated store: its rows in store order (replicas of random real rows)
        X5, y5 = X_train, y_train
    start = time.perf_counter()
    sparse = SparseGP(n_inducing=ISSUE5_INDUCING, random_state=args.seed).fit(X5, y5)
    fit_seconds = time.perf_counter() - start
    sparse_rmse = rmse(sparse.predict(X_test), y_test)
    say(f"sparse GP alone (m = {ISSUE5_INDUCING}) on {y5.size:,}: {fit_seconds:.1f} s, held-out RMSE "
        f"{sparse_rmse:.4g}, noise sd {np.sqrt(sparse.noise_) * sparse.y_std_:.4g}")
    memory_cap = int(np.sqrt(args.exact_memory_gb * 1e9 / (8 * 15)))
    rng = np.random.default_rng(args.seed)
    rng.permutation(n_first_run)  # issue 5's held-out draw came first from the same generator
    pilot_n = min(PILOT_N, y5.size)
    _, pilot_seconds = exact_gp(X5[:pilot_n], y5[:pilot_n], args.seed)
    exact_n = int(pilot_n * (fit_seconds / pilot_seconds) ** (1 / 3))
    exact_n = max(pilot_n, min(exact_n, memory_cap, y5.size))
    subset = rng.choice(y5.size, size=exact_n, replace=False)
    model, exact_seconds = exact_gp(X5[subset], y5[subset], args.seed)
    if exact_seconds > fit_seconds and exact_n > pilot_n:
        exact_n = max(pilot_n, int(0.8 * exact_n))
        subset = subset[:exact_n]
        model, exact_seconds = exact_gp(X5[subset], y5[subset], args.seed)
    exact_rmse = rmse(model.predict(X_test), y_test)
    say(f"exact GP on {exact_n}: {exact_seconds:.1f} s, held-out RMSE {exact_rmse:.4g}")

    print(json.dumps({
        "rollouts": n, "replicated": replicated, "n": int(y_train.size), "n_issue5": int(y5.size),
        "fit_prior_seconds": round(fit_seconds_prior, 2), "prior_rmse": round(prior_rmse, 5),
        "prior_r2": round(prior_r2, 5), "fits": fits, **figures, "peak_memory_mb": round(peak, 1),
        "fit_seconds": round(fit_seconds, 2), "rmse": round(sparse_rmse, 5), "exact_n": int(exact_n),
        "exact_seconds": round(exact_seconds, 2), "exact_rmse": round(exact_rmse, 5), "held_out": int(y_test.size),
        "inducing": prior_inducing, "issue5_inducing": ISSUE5_INDUCING, "objective_sd": round(float(np.std(y_test)), 5),
        "max_fall_risk": args.max_fall_risk, "inducing_comparison": inducing,
        "load_average": [round(v, 2) for v in os.getloadavg()],
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
    }))


if __name__ == "__main__":
    main()
