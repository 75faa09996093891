"""The simulation level at scale: sparse GP on 10^5 rollouts against scikit-learn's exact GP.

    .venv/bin/python benchmarks/prior_scale.py            # 10^5 rollouts of push_recovery
    .venv/bin/python benchmarks/prior_scale.py --quick    # 5,000 rollouts, a few minutes in all

1. Simulates ``--n`` rollouts of push_recovery with :func:`gapgauge.sim.sweep.sweep` into
   ``benchmarks/cache/push_recovery.sqlite`` (resumable: a second run reuses them).
2. Holds out ``--test`` standing rollouts (seeded) and fits the simulation level
   (:class:`gapgauge.compare.sparse.SparseGP`, Titsias 2009) on all the others; times it.
3. Fits scikit-learn's exact ``GaussianProcessRegressor`` (ConstantKernel * Matern(nu=2.5, ARD) +
   WhiteKernel, normalize_y, one optimiser start) on the largest random subset that fits in the same
   wall time: a pilot fit on 500 points, the size extrapolated by the n^3 cost, capped so that
   scikit-learn's (n x n x 15) gradient tensor stays under ``--exact-memory-gb``; if that fit overruns
   the budget, 0.8 times the size once more.
4. Held-out RMSE of both against the held-out rollouts' objective (noisy: physics randomisation).
5. Fits the whole prior on the cached store (objective and fall model, no hardware trials) and
   times one ``propose`` (K = 1) with it.

The last line printed is one JSON object
``{"n", "fit_seconds", "rmse", "exact_n", "exact_seconds", "exact_rmse", "propose_seconds", ...}``.
Targets: the 10^5 fit within 60 s on 2 cores; RMSE no worse than the exact GP; propose within 2 s.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from gapgauge.app.prior import read_prior_data
from gapgauge.app.sweep import sweep
from gapgauge.compare.prior import fit_prior
from gapgauge.compare.propose import propose
from gapgauge.compare.sparse import SparseGP
from gapgauge.scenario import load_scenario
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"
CACHE = Path(__file__).resolve().parent / "cache"
PILOT_N = 500


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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=100_000, help="simulated rollouts (default 10^5)")
    parser.add_argument("--quick", action="store_true", help="same as --n 5000")
    parser.add_argument("--test", type=int, default=2000, help="held-out standing rollouts")
    parser.add_argument("--inducing", type=int, default=300, help="inducing points of the sparse GP")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--exact-memory-gb", type=float, default=1.5,
                        help="cap on scikit-learn's gradient tensor (n^2 x 15 doubles)")
    parser.add_argument("--max-fall-risk", type=float, default=0.05,
                        help="fall-risk limit of the timed propose (the command's default)")
    parser.add_argument("--store", type=Path, default=None, help="store to use (default benchmarks/cache/)")
    args = parser.parse_args()
    n = 5000 if args.quick else args.n

    scenario = load_scenario(SCENARIO)
    CACHE.mkdir(exist_ok=True)
    store_path = args.store or CACHE / "push_recovery.sqlite"
    started = time.perf_counter()
    summary = sweep(scenario, n, seed=args.seed, store=store_path, progress=True)
    sweep_seconds = time.perf_counter() - started
    print(f"sweep: {summary.done} rollouts ({summary.ran_now} simulated now, {sweep_seconds:.0f} s); "
          f"ok {summary.ok}, fell {summary.fell}, diverged {summary.diverged}", flush=True)

    with Store(store_path) as store:
        run_ids = [summary.run_id]
        batch = store.rollouts(scenario.content_hash, kinds=("sweep",), run_ids=run_ids, status="ok")
    X = scenario.to_unit(batch.params)
    y = np.asarray(batch.objective, dtype=float)
    finite = np.isfinite(y)
    X, y = X[finite], y[finite]
    rng = np.random.default_rng(args.seed)
    order = rng.permutation(y.size)
    n_test = min(args.test, y.size // 5)  # at most a fifth held out, so --quick keeps most for training
    test, train = order[:n_test], order[n_test:]
    X_train, y_train, X_test, y_test = X[train], y[train], X[test], y[test]
    print(f"standing rollouts: {y.size}; training {y_train.size}, held out {y_test.size}; "
          f"objective sd {y.std():.4g}", flush=True)

    start = time.perf_counter()
    sparse = SparseGP(n_inducing=args.inducing, random_state=args.seed).fit(X_train, y_train)
    fit_seconds = time.perf_counter() - start
    sparse_rmse = rmse(sparse.predict(X_test), y_test)
    print(f"sparse GP (m = {args.inducing}) on {y_train.size}: {fit_seconds:.1f} s, held-out RMSE "
          f"{sparse_rmse:.4g}, noise sd {np.sqrt(sparse.noise_) * sparse.y_std_:.4g}", flush=True)

    memory_cap = int(np.sqrt(args.exact_memory_gb * 1e9 / (8 * 15)))
    pilot_n = min(PILOT_N, y_train.size)
    _, pilot_seconds = exact_gp(X_train[:pilot_n], y_train[:pilot_n], args.seed)
    exact_n = int(pilot_n * (fit_seconds / pilot_seconds) ** (1 / 3))
    exact_n = max(pilot_n, min(exact_n, memory_cap, y_train.size))
    print(f"exact GP pilot: {pilot_n} points in {pilot_seconds:.1f} s; trying {exact_n} "
          f"(memory cap {memory_cap})", flush=True)
    subset = rng.choice(y_train.size, size=exact_n, replace=False)
    model, exact_seconds = exact_gp(X_train[subset], y_train[subset], args.seed)
    if exact_seconds > fit_seconds and exact_n > pilot_n:
        exact_n = max(pilot_n, int(0.8 * exact_n))
        subset = subset[:exact_n]
        model, exact_seconds = exact_gp(X_train[subset], y_train[subset], args.seed)
    exact_rmse = rmse(model.predict(X_test), y_test)
    print(f"exact GP on {exact_n}: {exact_seconds:.1f} s, held-out RMSE {exact_rmse:.4g}", flush=True)

    start = time.perf_counter()
    # a full fit, store read included (the prior job would reuse a stored simulation level)
    with Store(store_path) as store:
        data = read_prior_data(scenario, store)
    prior = fit_prior(scenario, data, seed=args.seed, max_inducing=args.inducing,
                      progress=lambda stage, done, total: print(f"{stage} ({done}/{total})", flush=True))
    prior_seconds = time.perf_counter() - start
    start = time.perf_counter()
    propose(scenario, prior, count=1, max_fall_risk=args.max_fall_risk, seed=args.seed)
    propose_seconds = time.perf_counter() - start
    print(f"fit_prior (objective + fall model, {prior.n_sim} + {prior.n_sim_fall_model} points): "
          f"{prior_seconds:.1f} s; propose K = 1: {propose_seconds:.2f} s", flush=True)

    print(json.dumps({
        "n": int(y_train.size),
        "fit_seconds": round(fit_seconds, 2),
        "rmse": round(sparse_rmse, 5),
        "exact_n": int(exact_n),
        "exact_seconds": round(exact_seconds, 2),
        "exact_rmse": round(exact_rmse, 5),
        "propose_seconds": round(propose_seconds, 3),
        "rollouts": int(summary.done),
        "held_out": int(y_test.size),
        "inducing": args.inducing,
        "fit_prior_seconds": round(prior_seconds, 2),
        "objective_sd": round(float(y.std()), 5),
        "max_fall_risk": args.max_fall_risk,
    }))


if __name__ == "__main__":
    main()
