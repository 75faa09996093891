"""Does the trial budget hold up? Its P50 and P80 against real tuning runs on stand-in robots, and the stop rule.

Each run (seeded) takes one stand-in robot: a shipped profile (``--profiles``, by default every
``scenarios/standin/*.toml``) or, every other run, a profile drawn at random: each physical quantity of the
scenario's ``[physics]`` uniform on its range widened by 20% of its width on both sides (kept positive),
the sensor noise, bias and logging of the first shipped profile. Then, as a lab would:

1. a store holding the cached sweep of ``--scenario`` and its prior (fitted once, no hardware trials);
2. 3 to 5 first trials on the stand-in (``run_standin`` on a safe Sobol design; the full log path), taken
   in with ``ingest``;
3. the budget, ``gapgauge.app.budget.plan_budget`` with its defaults (the target it chooses: no fall, the
   success rule, an objective level), at the benchmark's horizon T, draws and candidates;
4. the realised tuning run, with the real proposal policy: ``gapgauge.compare.propose.propose`` (one
   trial, fall-risk limit 0.05; lifted to 1 for a trial when nothing meets it, as an engineer would),
   the trial run on the stand-in through the full log path (``run_standin`` -> ``read_log`` ->
   ``trial_record``), the prior's hardware levels refitted on all trials so far (objective: the trials
   that stood; fall model: every margin), for T trials. After each trial the stop rule
   (``gapgauge.compare.stop.stop_rule``, its defaults) is evaluated on the refitted prior.

The truth of a trial is the stand-in's clean outcome (``simulate`` at the profile's fixed physics,
without sensor noise): it reaches the target when it did not fall, met the scenario's ``[success]``
rule and scored at or below the budget's level. Realised trials to target: the first such trial, or
"> T".

Figures over all runs (and by shipped / random profile):

- coverage of P50 and P80: the fraction of runs whose realised trials to target are at most the
  prediction (a prediction of "> T" covers every outcome; runs beyond T on both counts are listed);
- the fraction of runs with a finite P80;
- sharpness: median P80 over median realised trials ("> T" counted as T + 1 on both sides);
- the stop rule: of the runs in which it said stop, the fraction whose incumbent then (the trial that
  stood with the lowest posterior mean) was truly within epsilon of the best reachable in the safe
  bounds: the lowest clean objective that stood on a Sobol design of the safe box refined by a (1+lambda)
  evolution strategy with the one-fifth rule (Rechenberg 1973), cached per profile.

Targets (issue 16): P80 finite in >= 80% of runs; P80 coverage in [0.70, 0.95]; P50 coverage in
[0.35, 0.65]; sharpness <= 2.5; stop rule right in >= 85% of the runs it stops. Last line: one JSON object.

    nice -n 10 .venv/bin/python benchmarks/budget_coverage.py [--quick] [--runs N] [--scenario S]
        [--profiles P.toml ...] [--seed S] [--max-trials T]

Caches (``benchmarks/cache/budget_coverage/``, gitignored): the sweep store with its prior, the random
profiles, the per-profile best reachable, and each realised run (it does not depend on the budget).
"""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import json
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from scipy.stats import qmc

from gapgauge.app.budget import plan_budget
from gapgauge.app.ingest import ingest, trial_record
from gapgauge.app.prior import current_prior, fit_prior
from gapgauge.app.sweep import sweep
from gapgauge.compare.budget import DEFAULT_CANDIDATES, BudgetPlan, candidate_set
from gapgauge.compare.propose import propose, safe_unit_bounds
from gapgauge.compare.stop import STOP_CANDIDATES, default_epsilon, stop_rule
from gapgauge.errors import GapgaugeError, ModelError
from gapgauge.features import success as success_rule
from gapgauge.logs import read_log
from gapgauge.scenario import Scenario, load_scenario
from gapgauge.sim.rollout import simulate
from gapgauge.sim.standin import load_profile, run_standin
from gapgauge.store import Store

ROOT = Path(__file__).absolute().parents[1]
CACHE = ROOT / "benchmarks" / "cache" / "budget_coverage"
MARGIN = "margin_of_stability"
MAX_FALL_RISK = 0.05
# bump when the realised runs' method (propose, the refits, the stop rule) changes: their cache is keyed by it
RUN_VERSION = "r1"
STOP_VERSION = "s2"  # the same for the stop rule's replay
BUDGET_VERSION = "b2"  # the same for the budget (plan_budget's method)
WIDEN = 0.2  # random profiles: each physics range widened by this share of its width on both sides
FULL = {"runs": 30, "max_trials": 20, "draws": 128, "candidates": DEFAULT_CANDIDATES, "sweep": 2000, "design": 2048,
        "refine": 8}
QUICK = {"runs": 4, "max_trials": 8, "draws": 32, "candidates": 256, "sweep": 1000, "design": 512, "refine": 3}
TARGETS = {"p80_finite": 0.80, "p80_coverage": (0.70, 0.95), "p50_coverage": (0.35, 0.65), "sharpness": 2.5,
           "stop_right": 0.85}


# ---- the stand-in robot ------------------------------------------------------------------------


class Robot:
    """A stand-in profile: clean outcomes (``simulate`` at its physics) and logged trials (its full log path)."""

    def __init__(self, scenario: Scenario, profile: Path):
        self.scenario, self.path = scenario, profile
        self.profile = load_profile(profile, scenario)
        self.physics = self.profile.physics_row(scenario)
        self.key = hashlib.sha256(profile.read_bytes()).hexdigest()[:12]

    def clean(self, U: np.ndarray) -> dict[str, np.ndarray]:
        """Clean outcomes at ``U (n x dim)`` (unit cube): objective (NaN where fell), fell, success."""
        params = np.clip(self.scenario.from_unit(np.atleast_2d(U)), *self.scenario.bounds(safe=True).T)
        batch = simulate(self.scenario, params, np.tile(self.physics, (params.shape[0], 1)), nthread=1)
        fell = np.asarray(batch.status) != "ok"
        return {"objective": np.where(fell, np.nan, np.asarray(batch.objective, dtype=float)), "fell": fell,
                "success": ~fell & success_rule(batch.features, self.scenario)}

    def logged(self, x: np.ndarray, seed: int, work: Path) -> tuple[float, float, bool, str]:
        """One trial at ``x (dim,)`` (scenario units) through the log path: (objective, margin, fell, why
        refused) as read. A log the reader refuses (e.g. a force spike beyond the plausible range) gives
        nothing to the model (NaN), as a lab would leave it out; the trial still counts."""
        params = [self.scenario.params_to_mapping(x)]
        csvs = run_standin(self.scenario, self.path, params, out_dir=work, seed=seed)
        if not csvs:  # the simulation diverged: no log
            return np.nan, np.nan, True, "diverged"
        try:
            record = trial_record(self.scenario, read_log(self.scenario, csvs[0]))
        except GapgaugeError as exc:
            return np.nan, np.nan, False, str(exc).split(": ", 1)[-1]
        fell = record.outcome == "fell" or bool(record.features.get("fell", 0.0) or 0.0)
        objective = np.nan if record.objective is None else float(record.objective)
        return objective, float(record.features.get(MARGIN, np.nan)), fell, ""

    def best_reachable(self, n_design: int, rounds: int) -> float:
        """The lowest clean objective that stood and met the success rule in the safe box (cached)."""
        path = CACHE / f"best_{self.scenario.content_hash}_{self.key}_{n_design}_{rounds}.json"
        if path.exists():
            return float(json.loads(path.read_text())["best"])
        safe = safe_unit_bounds(self.scenario)
        sobol = qmc.Sobol(self.scenario.dim, scramble=True, seed=np.random.default_rng(11))
        U = safe[:, 0] + sobol.random_base2(int(np.ceil(np.log2(n_design)))) * (safe[:, 1] - safe[:, 0])
        out = self.clean(U)
        value = np.where(out["success"], out["objective"], np.inf)
        order = np.argsort(value)[:8]
        x, f = U[order].copy(), value[order].copy()
        step, rng = np.full(len(f), 0.05), np.random.default_rng(12)
        for _ in range(rounds):
            trial = x[:, None, :] + step[:, None, None] * (safe[:, 1] - safe[:, 0]) * rng.standard_normal(
                (len(f), 16, U.shape[1]))
            trial = np.clip(trial, safe[:, 0], safe[:, 1]).reshape(-1, U.shape[1])
            res = self.clean(trial)
            v = np.where(res["success"], res["objective"], np.inf).reshape(len(f), 16)
            j = np.argmin(v, axis=1)
            better = v[np.arange(len(f)), j] < f
            x[better], f[better] = trial.reshape(len(f), 16, -1)[better, j[better]], v[better, j[better]]
            step = np.clip(np.where(better, step * 1.5, step * 0.7), 0.002, 0.3)
        CACHE.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps({"best": float(np.min(f)), "design": n_design, "rounds": rounds}) + "\n")
        return float(np.min(f))


def fitting_profiles(scenario: Scenario) -> list[Path]:
    """The shipped profiles (``scenarios/standin/*.toml``) that are valid for ``scenario`` (others, written
    for another body, are skipped with a line on stderr)."""
    out = []
    for path in sorted((ROOT / "scenarios" / "standin").glob("*.toml")):
        try:
            load_profile(path, scenario)
            out.append(path)
        except GapgaugeError as exc:
            print(f"skipped profile {path.name}: {exc}", file=sys.stderr)
    return out


def random_profile(scenario: Scenario, base: Path, seed: int) -> Path:
    """A profile with physics drawn uniformly on the scenario's ranges widened by ``WIDEN`` (kept
    positive), the rest of ``base``'s tables; written to the cache."""
    rng = np.random.default_rng([20261, seed])
    lines = [f'name = "random_{seed}"', f'description = "physics drawn at random (seed {seed}), noise of {base.stem}"',
             f'robot_id = "standin-random-{seed}"', "", "[physics]"]
    for r in scenario.physics:
        width = r.high - r.low
        low, high = r.low - WIDEN * width, r.high + WIDEN * width
        if r.low > 0:
            low = max(low, 0.05 * r.low)
        lines.append(f"{r.name} = {rng.uniform(low, high):.6g}")
    text = base.read_text()
    rest = text[text.index("[noise]"):] if "[noise]" in text else ""
    path = CACHE / "profiles" / f"random_{scenario.content_hash}_{seed}.toml"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines) + "\n\n" + rest)
    return path


# ---- one run -----------------------------------------------------------------------------------


def sweep_store(scenario: Scenario, rollouts: int) -> Path:
    """The cached sweep with its prior (no hardware trials), built once."""
    path = CACHE / f"sweep_{scenario.content_hash}_{rollouts}.sqlite"
    if not path.exists():
        CACHE.mkdir(parents=True, exist_ok=True)
        partial = path.with_suffix(".partial")
        with Store(partial) as store:
            sweep(scenario, rollouts, store=store, seed=0, workers=2)
            fit_prior(scenario, store, seed=0)
        partial.rename(path)
    return path


def refitted(base, X: list, y: list, Xm: list, m: list):
    """``base`` with its hardware levels refitted (hyperparameters too) on the trials so far."""
    objective = base.objective_model.copy_with_high(np.array(X), np.array(y), optimize=True)
    fall = base.fall_model.copy_with_high(np.array(Xm), np.array(m), optimize=True)
    return dataclasses.replace(base, objective_model=objective, fall_model=fall, n_hardware=len(y),
                               n_hardware_fall_model=len(m), notes=[])


def _data(base) -> tuple[list, list, list, list]:
    obj, fall = base.objective_model, base.fall_model
    return [*obj.X_high_], [*obj.y_high_], [*fall.model_.X_high_], [*fall.model_.y_high_]


def _add(data: tuple[list, list, list, list], row: dict) -> None:
    X, y, Xm, m = data
    u = np.array(row["u"])
    if not row["logged_fell"] and np.isfinite(row["logged"]):
        X.append(u)
        y.append(row["logged"])
    if np.isfinite(row["logged_margin"]):
        Xm.append(u)
        m.append(row["logged_margin"])


def realised_run(scenario: Scenario, robot: Robot, base, key: str, seed: int, max_trials: int, work: Path) -> list:
    """The real tuning run from the prior ``base`` (cached; it does not depend on the budget)."""
    path = CACHE / "runs" / f"{RUN_VERSION}_{key}.json"
    if path.exists():
        return json.loads(path.read_text())
    data, prior, rng, rows = _data(base), base, np.random.default_rng([seed, 7]), []
    for t in range(max_trials):
        lifted = False
        try:
            proposals = propose(scenario, prior, max_fall_risk=MAX_FALL_RISK, seed=int(rng.integers(2**31)))
        except ModelError:
            proposals = propose(scenario, prior, max_fall_risk=1.0, seed=int(rng.integers(2**31)))
            lifted = True
        x = scenario.params_from_mapping(proposals.proposals[0].params)
        u = scenario.to_unit(x[None])[0]
        clean = robot.clean(u[None])
        y_t, m_t, fell_t, refused = robot.logged(x, seed * 1000 + t, work)
        rows.append({"u": u.tolist(), "objective": float(clean["objective"][0]), "fell": bool(clean["fell"][0]),
                     "success": bool(clean["success"][0]), "logged": y_t, "logged_margin": m_t,
                     "logged_fell": fell_t, "lifted": lifted, "refused": refused})
        _add(data, rows[-1])
        prior = refitted(base, *data)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(rows) + "\n")
    return rows


def stop_replay(scenario: Scenario, robot: Robot, base, key: str, rows: list, factor: float = 1.0) -> list:
    """The stop rule after each trial of a realised run, replaying its refits (cached): its defaults, or
    its default epsilon times ``factor`` (the same Sobol points as the rule's own, seeded alike)."""
    name = f"stop_{STOP_VERSION}_{key}.json" if factor == 1.0 else f"stop_{STOP_VERSION}_x{factor:g}_{key}.json"
    path = CACHE / "runs" / name
    if path.exists():
        return json.loads(path.read_text())
    data, out = _data(base), []
    for t, row in enumerate(rows):
        _add(data, row)
        epsilon = None
        if factor != 1.0:
            epsilon = factor * default_epsilon(base, candidate_set(scenario, STOP_CANDIDATES, np.random.default_rng(t)))
        rule = stop_rule(refitted(base, *data), epsilon=epsilon, seed=t)
        truth = None
        if rule.incumbent is not None:
            truth = robot.clean(scenario.to_unit(scenario.params_from_mapping(rule.incumbent)[None]))
        out.append({"stop": rule.stop, "probability": rule.probability, "epsilon": rule.epsilon,
                    "incumbent_objective": None if truth is None else float(truth["objective"][0]),
                    "incumbent_success": None if truth is None else bool(truth["success"][0])})
    path.write_text(json.dumps(out) + "\n")
    return out


def one_run(scenario: Scenario, sweep_path: Path, robot: Robot, seed: int, cfg: dict, work: Path) -> dict:
    store_path = work / f"run_{seed}.sqlite"
    shutil.copyfile(sweep_path, store_path)
    n_first = 3 + seed % 3
    key = f"{scenario.content_hash}_{robot.key}_{sweep_path.stem}_{seed}_{cfg['max_trials']}"
    plan_path = CACHE / "runs" / f"budget_{BUDGET_VERSION}_{key}_{cfg['draws']}_{cfg['candidates']}.json"
    with Store(store_path) as store:
        logs = run_standin(scenario, robot.path, design=n_first, out_dir=work / f"logs_{seed}", seed=seed)
        ingest(scenario, store, logs, matches=4, seed=seed)
        if plan_path.exists():
            plan = BudgetPlan.from_dict(json.loads(plan_path.read_text()))
        else:
            plan = plan_budget(scenario, store, seed=seed, max_trials=cfg["max_trials"], draws=cfg["draws"],
                               n_candidates=cfg["candidates"])
            plan_path.parent.mkdir(parents=True, exist_ok=True)
            plan_path.write_text(plan.to_json() + "\n")
        base = current_prior(scenario, store, seed=seed)
    trials = realised_run(scenario, robot, base, key, seed, cfg["max_trials"], work / f"trials_{seed}")
    stops = stop_replay(scenario, robot, base, key, trials, cfg["stop_factor"])
    T, level = cfg["max_trials"], plan.target.level
    hit = [t + 1 for t, r in enumerate(trials) if r["success"] and r["objective"] <= level]
    realised = hit[0] if hit else None
    best = robot.best_reachable(cfg["design"], cfg["refine"])
    stopped = next((t + 1 for t, r in enumerate(stops) if r["stop"]), None)
    right = None
    if stopped is not None:
        r = stops[stopped - 1]
        right = bool(r["incumbent_success"] and r["incumbent_objective"] <= best + r["epsilon"])

    def covered(p: int | None) -> bool:
        return p is None or (realised is not None and realised <= p)

    wp = plan.with_prior
    regret = None if stopped is None else stops[stopped - 1]["incumbent_objective"] - best
    within = [t + 1 for t, r in enumerate(stops)
              if r["incumbent_success"] and r["incumbent_objective"] <= best + r["epsilon"]]
    return {
        "profile": robot.profile.name, "kind": "random" if robot.profile.name.startswith("random_") else "shipped",
        "seed": seed, "first_trials": n_first, "level": level, "within": plan.target.within,
        "reach_share": plan.target.reach_share, "p50": wp.p50, "p80": wp.p80, "p95": wp.p95,
        "cold_p80": plan.cold_start.p80, "realised": realised, "covered50": covered(wp.p50),
        "covered80": covered(wp.p80), "both_beyond_T": wp.p80 is None and realised is None,
        "best_found": min((r["objective"] for r in trials if r["success"]), default=None), "best_reachable": best,
        "stopped_at": stopped, "stop_right": right, "stop_regret": regret,
        "first_within_epsilon": within[0] if within else None,
        "final_stop_probability": stops[-1]["probability"] if stops else None,
        "stop_epsilon": stops[-1]["epsilon"] if stops else None, "objective_scale": plan.objective_scale,
        "lifted": int(sum(r["lifted"] for r in trials)), "falls": int(sum(r["fell"] for r in trials)),
        "refused_logs": int(sum(bool(r.get("refused")) for r in trials)),
        "T": T,
    }


# ---- figures -----------------------------------------------------------------------------------


def figures(rows: list[dict], T: int) -> dict:
    def value(v: int | None) -> int:
        return T + 1 if v is None else v

    stopped = [r for r in rows if r["stopped_at"] is not None]
    realised = np.median([value(r["realised"]) for r in rows])
    return {
        "runs": len(rows),
        "p80_finite": float(np.mean([r["p80"] is not None for r in rows])),
        "p80_coverage": float(np.mean([r["covered80"] for r in rows])),
        "p50_coverage": float(np.mean([r["covered50"] for r in rows])),
        "sharpness": float(np.median([value(r["p80"]) for r in rows]) / realised),
        "median_p80": float(np.median([value(r["p80"]) for r in rows])),
        "median_realised": float(realised),
        "both_beyond_T": int(sum(r["both_beyond_T"] for r in rows)),
        "stopped_runs": len(stopped),
        "stop_right": float(np.mean([r["stop_right"] for r in stopped])) if stopped else None,
        # runs whose incumbent was truly within epsilon by T, and of those, how many the rule stopped
        "within_epsilon_runs": int(sum(r.get("first_within_epsilon") is not None for r in rows)),
        "within_and_stopped": int(sum(r.get("first_within_epsilon") is not None and r["stopped_at"] is not None
                                      for r in rows)),
    }


def verdicts(f: dict) -> dict[str, bool | None]:
    return {
        "p80_finite": f["p80_finite"] >= TARGETS["p80_finite"],
        "p80_coverage": TARGETS["p80_coverage"][0] <= f["p80_coverage"] <= TARGETS["p80_coverage"][1],
        "p50_coverage": TARGETS["p50_coverage"][0] <= f["p50_coverage"] <= TARGETS["p50_coverage"][1],
        "sharpness": f["sharpness"] <= TARGETS["sharpness"],
        "stop_right": None if f["stop_right"] is None else f["stop_right"] >= TARGETS["stop_right"],
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a few short runs on a small sweep (a smoke test)")
    parser.add_argument("--runs", type=int, default=None, help="tuning runs (default 30; 4 with --quick)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the first run (run i uses seed + i)")
    parser.add_argument("--max-trials", type=int, default=None, help="horizon T of the budget and the runs")
    parser.add_argument("--scenario", default=str(ROOT / "scenarios" / "push_recovery.toml"))
    parser.add_argument("--profiles", nargs="*", default=None,
                        help="stand-in profiles (default: scenarios/standin/*.toml)")
    parser.add_argument("--random-every", type=int, default=2,
                        help="every n-th run takes a random profile (0: none)")
    parser.add_argument("--stop-epsilon-factor", type=float, default=1.0,
                        help="evaluate the stop rule at its default epsilon times this (the targets are for 1)")
    args = parser.parse_args()
    cfg = dict(QUICK if args.quick else FULL)
    cfg["stop_factor"] = args.stop_epsilon_factor
    cfg["runs"] = args.runs or cfg["runs"]
    cfg["max_trials"] = args.max_trials or cfg["max_trials"]
    scenario = load_scenario(args.scenario)
    shipped = [Path(p) for p in args.profiles] if args.profiles else fitting_profiles(scenario)
    started = time.perf_counter()
    sweep_path = sweep_store(scenario, cfg["sweep"])
    rows = []
    n_shipped = 0
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(cfg["runs"]):
            seed = args.seed + i
            if args.random_every and i % args.random_every == args.random_every - 1:
                profile = random_profile(scenario, shipped[0], seed)
            else:
                profile, n_shipped = shipped[n_shipped % len(shipped)], n_shipped + 1
            row = one_run(scenario, sweep_path, Robot(scenario, profile), seed, cfg, Path(tmp))
            rows.append(row)
            print(json.dumps(row), file=sys.stderr, flush=True)
    T = cfg["max_trials"]
    summary = figures(rows, T)
    by_kind = {k: figures([r for r in rows if r["kind"] == k], T) for k in ("shipped", "random")
               if any(r["kind"] == k for r in rows)}
    print(f"{'':10} {'runs':>5} {'P80 finite':>11} {'P80 cov':>8} {'P50 cov':>8} {'sharpness':>10} {'stopped':>8} "
          f"{'stop right':>11}")
    for name, f in [("all", summary), *by_kind.items()]:
        right = "-" if f["stop_right"] is None else f"{f['stop_right']:.2f}"
        print(f"{name:10} {f['runs']:5d} {f['p80_finite']:11.2f} {f['p80_coverage']:8.2f} {f['p50_coverage']:8.2f} "
              f"{f['sharpness']:10.2f} {f['stopped_runs']:8d} {right:>11}")
    met = verdicts(summary)
    words = {True: "met", False: "missed", None: "n/a (no run stopped)"}
    print("targets: " + "; ".join(f"{k} {words[v]}" for k, v in met.items()))
    print(json.dumps({**summary, "by_kind": by_kind, "met": met, "config": cfg, "scenario": scenario.name,
                      "profiles": [p.stem for p in shipped], "seconds": round(time.perf_counter() - started, 1),
                      "date": datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")}))


if __name__ == "__main__":
    main()
