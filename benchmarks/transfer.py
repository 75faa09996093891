"""Hardware trials saved by the simulation prior, on stand-in robots whose truth is known (issue 9).

For every stand-in profile shipped (``scenarios/standin/*.toml``) and every seed, four ways of tuning the
13 push_recovery controller parameters are run for ``--trials`` hardware trials each
(``benchmarks/transfer_methods.py``): gapgauge (sweep prior, multi-fidelity BO under the fall-risk
limit), cold-start BO on the stand-in alone, the simulation's optimum first then the same cold-start BO
(zero-shot), and random search in the safe bounds. The stand-in's truth, its observation noise (measured
on the full stand-in log path), its best achievable objective in the safe bounds and the median of
random safe parameter sets are described in ``benchmarks/transfer_standin.py``.

Figures per method over all runs (profiles x seeds):

- trials to get 95% of the way from the random median to the best achievable (a trial that stood with
  a clean objective at or below ``median - 0.95 (median - best)``): median and interquartile range, runs
  that never get there counted as ``trials + 1``, and the fraction not reached;
- falls during tuning as a fraction of all trials (``fall_free_fraction`` is one minus it);
- the index of the first trial without a fall (median);
- the best objective so far after 5, 10 and 20 trials (falls scored as the scenario's ``fall_value``)
  and the same as progress from the random median (0) to the best achievable (1);
- ``first_trial_success``: the fraction of runs whose first trial did not fall
  (``first_trial_success_rule``: ... and met the scenario's ``[success]`` rule, recovery within 2 s).

Prints a table, saves ``benchmarks/transfer.png`` (best-so-far objective vs trial, median and IQR per
method, one panel per profile) and ends with one JSON line.

    .venv/bin/python benchmarks/transfer.py [--quick] [--seeds N] [--trials T] [--jobs J]

Caches (``benchmarks/cache/transfer/``, gitignored): the sweep store with its fitted prior, keyed by the
scenario's content hash and the number of rollouts; per profile, the noise measurement and the
best-achievable reference.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from datetime import datetime, timezone
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
from transfer_methods import METHODS, TuningRun, simulation_optimum, tune  # noqa: E402
from transfer_standin import CACHE, ROOT, StandinTruth, profiles  # noqa: E402

from gapgauge import load_scenario  # noqa: E402
from gapgauge.app.prior import load_prior, read_prior_data, save_prior  # noqa: E402
from gapgauge.app.sweep import sweep  # noqa: E402
from gapgauge.compare.prior import fit_prior  # noqa: E402
from gapgauge.errors import ModelError, StoreError  # noqa: E402
from gapgauge.store import Store  # noqa: E402

SCENARIO = ROOT / "scenarios" / "push_recovery.toml"
PLOT = ROOT / "benchmarks" / "transfer.png"
TARGET_FRACTION = 0.95
CHECKPOINTS = (5, 10, 20)
SWEEP_SEED = 0
FULL = {"seeds": 10, "trials": 30, "sweep": 4096, "design": 4096, "refine": 12}
QUICK = {"seeds": 2, "trials": 12, "sweep": 1024, "design": 1024, "refine": 4}


# ---- caches --------------------------------------------------------------------------------------


def sweep_store(scenario, rollouts: int) -> Path:
    """The cached sweep (resumable: an interrupted build continues where it stopped)."""
    path = CACHE / f"sweep_{scenario.content_hash}_{rollouts}_s{SWEEP_SEED}.sqlite"
    CACHE.mkdir(parents=True, exist_ok=True)
    store = Store(path)
    try:
        sweep(scenario, rollouts, store=store, seed=SWEEP_SEED, workers=2, progress=False)
    finally:
        store.close()
    return path


def model_code_key() -> str:
    """Hash of the modelling code (gapgauge/compare): a stored prior fitted by other code is refitted."""
    import gapgauge.compare as compare

    digest = hashlib.sha256()
    for path in sorted(Path(compare.__file__).parent.glob("*.py")):
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


def sweep_prior(scenario, path: Path):
    """The prior of the sweep alone (no hardware trials): the stored one if fitted by the current
    modelling code, else fitted and stored."""
    key_path = path.with_suffix(".prior_key")
    key = model_code_key()
    store = Store(path)
    try:
        try:
            prior = load_prior(scenario, store)
            if prior.n_hardware == 0 and prior.seed == SWEEP_SEED and key_path.exists() and key_path.read_text() == key:
                return prior
        except (ModelError, StoreError):  # none stored, or stored by an older gapgauge
            pass
        # a full fit (no reuse of a stored simulation level: that may be the older code's)
        prior = fit_prior(scenario, read_prior_data(scenario, store), seed=SWEEP_SEED)
        save_prior(store, prior)
        key_path.write_text(key)
        return prior
    finally:
        store.close()


# ---- worker processes --------------------------------------------------------------------------

_STATE: dict = {}


def _init(store_path: str, noises: dict, sim_optimum: np.ndarray) -> None:
    scenario = load_scenario(SCENARIO)
    store = Store(store_path)
    _STATE.update(scenario=scenario, prior=load_prior(scenario, store), noises=noises, sim_optimum=sim_optimum,
                  truths={})
    store.close()


def _task(args: tuple[str, int, int, str, int]) -> TuningRun:
    profile, profile_index, seed, method, trials = args
    truths = _STATE["truths"]
    if profile not in truths:
        truths[profile] = StandinTruth(_STATE["scenario"], profile)
    return tune(method, _STATE["prior"], truths[profile], _STATE["noises"][profile], seed, profile_index, trials,
                _STATE["sim_optimum"])


# ---- figures -----------------------------------------------------------------------------------


def run_figures(run: TuningRun, ref: dict, trials: int) -> dict:
    target = ref["random_median"] - TARGET_FRACTION * (ref["random_median"] - ref["best"])
    hit = np.flatnonzero(~run.fell & (run.objective <= target))
    stood = np.flatnonzero(~run.fell)
    best_so_far = np.minimum.accumulate(run.scored)
    progress = (ref["random_median"] - best_so_far) / (ref["random_median"] - ref["best"])
    return {
        "trials_to_target": int(hit[0]) + 1 if hit.size else trials + 1,
        "falls": int(run.fell.sum()),
        "first_fall_free": int(stood[0]) + 1 if stood.size else trials + 1,
        "first_stood": bool(not run.fell[0]),
        "first_success": bool(run.success[0]),
        "limit_lifted": int(run.limit_lifted.sum()),
        "best_so_far": best_so_far,
        "progress": progress,
        "seconds": run.seconds,
    }


def summarise(rows: list[dict], trials: int) -> dict:
    reach = np.array([r["trials_to_target"] for r in rows])
    falls = sum(r["falls"] for r in rows)
    out = {
        "median_trials": float(np.median(reach)),
        "trials_iqr": [float(np.percentile(reach, 25)), float(np.percentile(reach, 75))],
        "not_reached_fraction": float(np.mean(reach > trials)),
        "fall_free_fraction": 1.0 - falls / (trials * len(rows)),
        "first_trial_success": float(np.mean([r["first_stood"] for r in rows])),
        "first_trial_success_rule": float(np.mean([r["first_success"] for r in rows])),
        "first_fall_free_trial_median": float(np.median([r["first_fall_free"] for r in rows])),
        "limit_lifted_trials": int(sum(r["limit_lifted"] for r in rows)),
        "seconds_per_run": float(np.mean([r["seconds"] for r in rows])),
    }
    for n in CHECKPOINTS:
        if n <= trials:
            out[f"objective_after_{n}"] = float(np.median([r["best_so_far"][n - 1] for r in rows]))
            out[f"progress_after_{n}"] = float(np.median([r["progress"][n - 1] for r in rows]))
    return out


def print_table(refs: dict, noises: dict, summary: dict, trials: int) -> None:
    print("stand-in references (safe bounds; objective lower is better, falls scored as fall_value):")
    print(f"{'profile':<16}{'best':>8}{'design best':>12}{'random median':>15}{'target':>8}{'falls in box':>13}"
          f"{'obj noise sd':>13}{'obj offset':>11}")
    for p, ref in refs.items():
        target = ref["random_median"] - TARGET_FRACTION * (ref["random_median"] - ref["best"])
        print(f"{p:<16}{ref['best']:>8.3f}{ref['best_design']:>12.3f}{ref['random_median']:>15.3f}{target:>8.3f}"
              f"{ref['fall_fraction']:>13.1%}{noises[p]['objective_sd']:>13.4f}{noises[p]['objective_offset']:>11.4f}")
    print()
    head = (f"{'method':<12}{'trials to 95%':>15}{'IQR':>10}{'not reached':>12}{'falls':>8}{'1st ok':>8}"
            f"{'1st no-fall':>12}")
    for n in CHECKPOINTS:
        if n <= trials:
            head += f"{f'obj@{n}':>8}{f'prog@{n}':>8}"
    print(head)
    for method, s in summary.items():
        iqr = f"{s['trials_iqr'][0]:.0f}-{s['trials_iqr'][1]:.0f}"
        line = (f"{method:<12}{s['median_trials']:>15.1f}{iqr:>10}"
                f"{s['not_reached_fraction']:>12.0%}{1 - s['fall_free_fraction']:>8.1%}{s['first_trial_success']:>8.0%}"
                f"{s['first_fall_free_trial_median']:>12.1f}")
        for n in CHECKPOINTS:
            if n <= trials:
                line += f"{s[f'objective_after_{n}']:>8.3f}{s[f'progress_after_{n}']:>8.2f}"
        print(line)
    print(f"(trials to 95%: runs not reached within {trials} trials counted as {trials + 1}; falls: fraction of all "
          "tuning trials; 1st ok: first trial did not fall; obj@n: median best-so-far objective; prog@n: 0 = random "
          "median, 1 = best achievable)")


def plot(results: dict, refs: dict, trials: int, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = list(refs)
    fig, axes = plt.subplots(1, len(names), figsize=(4.6 * len(names), 3.8), sharey=False, squeeze=False)
    x = np.arange(1, trials + 1)
    for ax, profile in zip(axes[0], names, strict=True):
        ref = refs[profile]
        for method in results:
            curves = np.array([r["best_so_far"] for r in results[method] if r["profile"] == profile])
            if not curves.size:
                continue
            q25, q50, q75 = np.percentile(curves, [25, 50, 75], axis=0)
            (line,) = ax.plot(x, q50, label=method)
            ax.fill_between(x, q25, q75, color=line.get_color(), alpha=0.2)
        target = ref["random_median"] - TARGET_FRACTION * (ref["random_median"] - ref["best"])
        ax.axhline(ref["best"], color="k", lw=0.8, ls="--", label="best achievable")
        ax.axhline(target, color="k", lw=0.8, ls=":", label="95% target")
        ax.axhline(ref["random_median"], color="grey", lw=0.8, ls="-.", label="random median")
        ax.set_title(f"stand-in {profile}")
        ax.set_xlabel("hardware trial")
        ax.set_ylim(0.0, max(ref["random_median"] * 1.3, 1.0))
    axes[0][0].set_ylabel("best objective so far (lower is better)")
    axes[0][-1].legend(fontsize=7, loc="upper right")
    fig.suptitle("push_recovery: best-so-far objective vs hardware trial (median and IQR over seeds)", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


# ---- main ----------------------------------------------------------------------------------------


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer seeds and trials, smaller caches")
    parser.add_argument("--seeds", type=int, default=None, help="seeds per profile")
    parser.add_argument("--trials", type=int, default=None, help="hardware trials per run")
    parser.add_argument("--jobs", type=int, default=2, help="worker processes")
    parser.add_argument("--methods", default=",".join(METHODS), help="comma-separated subset of methods")
    parser.add_argument("--plot", default=str(PLOT), help="where to save the plot")
    args = parser.parse_args()
    config = dict(QUICK if args.quick else FULL)
    config["seeds"] = args.seeds or config["seeds"]
    config["trials"] = args.trials or config["trials"]
    methods = [m for m in args.methods.split(",") if m]
    trials = config["trials"]
    started = time.perf_counter()
    say = lambda text: print(f"[{time.perf_counter() - started:6.0f} s] {text}", file=sys.stderr, flush=True)  # noqa: E731

    scenario = load_scenario(SCENARIO)
    store_path = sweep_store(scenario, config["sweep"])
    say(f"sweep: {config['sweep']} rollouts cached at {store_path.name}")
    prior = sweep_prior(scenario, store_path)
    say(f"prior: {prior.n_sim} standing rollouts, {prior.n_sim_fall_model} margins")
    names = profiles()
    refs, noises = {}, {}
    for name in names:
        truth = StandinTruth(scenario, name, nthread=2)
        noises[name] = truth.noise()
        refs[name] = truth.reference(config["design"], config["refine"])
        say(f"{name}: best {refs[name]['best']:.3f}, random median {refs[name]['random_median']:.3f}")
    sim_optimum = simulation_optimum(prior)

    tasks = [(p, i, seed, m, trials) for seed in range(config["seeds"]) for i, p in enumerate(names) for m in methods]
    results: dict[str, list[dict]] = {m: [] for m in methods}
    with ProcessPoolExecutor(args.jobs, initargs=(str(store_path), noises, sim_optimum), initializer=_init) as pool:
        for k, run in enumerate(pool.map(_task, tasks)):
            row = run_figures(run, refs[run.profile], trials) | {"profile": run.profile, "seed": run.seed}
            results[run.method].append(row)
            say(f"{k + 1}/{len(tasks)} {run.method} {run.profile} seed {run.seed}: to target "
                f"{row['trials_to_target']}, falls {row['falls']}, first stood {row['first_stood']}, "
                f"{run.seconds:.0f} s")

    summary = {m: summarise(results[m], trials) for m in methods}
    print_table(refs, noises, summary, trials)
    plot(results, refs, trials, Path(args.plot))
    out = {
        "seeds": config["seeds"],
        "profiles": names,
        **summary,
        "trials": trials,
        "target_fraction": TARGET_FRACTION,
        "sweep_rollouts": config["sweep"],
        "reference_design": config["design"],
        "quick": args.quick,
        "date": datetime.now(timezone.utc).date().isoformat(),
        "seconds": round(time.perf_counter() - started, 1),
    }
    if "gapgauge" in summary and "cold_start" in summary:
        out["speedup_vs_cold_start"] = summary["cold_start"]["median_trials"] / summary["gapgauge"]["median_trials"]
    print(json.dumps(out))


if __name__ == "__main__":
    main()
