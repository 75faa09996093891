"""The stand-in robots of benchmarks/transfer.py: their truth, their observation noise, their best achievable.

Truth. A stand-in trial at parameters ``x`` is what :func:`gapgauge.sim.standin.run_standin` simulates:
the scenario at the profile's FIXED physics (:meth:`StandinProfile.physics_row`), measured through the
logger's resampling and low-pass (``simulate`` does that). Its objective, fall outcome and margin of
stability are deterministic in ``x``. What a hardware log adds on top (sensor noise and bias, timestamp
jitter, dropped samples, then ``read_log`` + the features) is measured once per profile by running the
full stand-in log path (``run_standin`` -> ``read_log`` -> ``trial_record``) on a few safe parameter sets
with several corruption seeds: the per-trial noise sd and the mean offset of the logged objective and
margin against the clean ones. A tuning trial is then observed as ``clean + offset + N(0, sd^2)``, the
noise drawn from the run's seed; the clean objective is what the figures score.

Best achievable and random median, per profile, cached in ``benchmarks/cache/transfer/`` under the
profile name, the scenario's content hash and the design size: a scrambled Sobol design of
``n_design`` points uniform in the SAFE box (the unit cube of the full bounds, log axes in log, as
gapgauge's own designs), simulated on the stand-in; the random median is the median of its objective
with falls counted as the scenario's ``fall_value``; the best achievable is the lowest standing objective
after a local refinement of the 8 best design points: a batched (1+lambda) evolution strategy with
the one-fifth success rule (Rechenberg 1973), 16 Gaussian steps per incumbent per round, clipped to
the safe box.
"""

from __future__ import annotations

import json
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.stats import qmc

from gapgauge.app.ingest import trial_record
from gapgauge.compare.propose import safe_unit_bounds
from gapgauge.features import success as success_rule
from gapgauge.logs import read_log
from gapgauge.scenario import Scenario
from gapgauge.sim.rollout import simulate
from gapgauge.sim.standin import load_profile, run_standin

ROOT = Path(__file__).resolve().parents[1]
CACHE = ROOT / "benchmarks" / "cache" / "transfer"
PROFILE_DIR = ROOT / "scenarios" / "standin"
MARGIN = "margin_of_stability"
REFINE_INCUMBENTS = 8
REFINE_STEPS = 16
NOISE_POINTS = 12
NOISE_SEEDS = 3


def profiles() -> list[str]:
    """Every stand-in profile shipped, by name (file stem), sorted."""
    return sorted(p.stem for p in PROFILE_DIR.glob("*.toml"))


@dataclass
class Outcome:
    """Clean stand-in outcomes of ``n`` trials: ``objective (n,)`` (NaN where fell), ``fell (n,)`` bool,
    ``margin (n,)`` m, ``success (n,)`` bool (the scenario's ``[success]`` rule), and ``scored (n,)``:
    the objective with falls counted as ``fall_value``."""

    objective: np.ndarray
    fell: np.ndarray
    margin: np.ndarray
    success: np.ndarray
    scored: np.ndarray


class StandinTruth:
    """One stand-in profile's truth (see the module docstring); inputs in the unit cube of the full bounds."""

    def __init__(self, scenario: Scenario, profile: str, nthread: int = 1):
        self.scenario = scenario
        self.name = profile
        self.path = PROFILE_DIR / f"{profile}.toml"
        self.profile = load_profile(self.path, scenario)
        self.physics = self.profile.physics_row(scenario)
        self.nthread = nthread
        self.safe = safe_unit_bounds(scenario)
        self.evaluations = 0

    def evaluate(self, U: np.ndarray) -> Outcome:
        """Clean outcomes at ``U (n x dim)`` (unit cube of the full bounds)."""
        U = np.atleast_2d(U)
        params = np.clip(self.scenario.from_unit(U), *self.scenario.bounds(safe=True).T)
        batch = simulate(self.scenario, params, np.tile(self.physics, (U.shape[0], 1)), nthread=self.nthread)
        self.evaluations += U.shape[0]
        status = np.asarray(batch.status)
        fell = status != "ok"  # diverged counts as a fall: no robot reports a measurement after it
        objective = np.where(fell, np.nan, np.asarray(batch.objective, dtype=float))
        margin = np.asarray(batch.features[MARGIN], dtype=float)
        margin = np.where(np.isfinite(margin), margin, -1.0)
        success = ~fell & success_rule(batch.features, self.scenario)
        scored = np.where(fell, self.scenario.objective.fall_value, objective)
        return Outcome(objective, fell, margin, success, scored)

    # ---- observation noise from the full log path ------------------------------------------------
    def noise(self) -> dict[str, float]:
        """Offset and sd of the logged objective and margin against the clean ones (cached)."""
        path = CACHE / f"noise_{self.name}_{self.scenario.content_hash}_{NOISE_POINTS}x{NOISE_SEEDS}.json"
        if path.exists():
            return json.loads(path.read_text())
        U = safe_sobol(self.scenario, NOISE_POINTS, seed=7)
        clean = self.evaluate(U)
        stood = np.flatnonzero(~clean.fell)
        params = [self.scenario.params_to_mapping(x) for x in self.scenario.from_unit(U[stood])]
        logged_obj = np.full((NOISE_SEEDS, stood.size), np.nan)
        logged_margin = np.full((NOISE_SEEDS, stood.size), np.nan)
        with tempfile.TemporaryDirectory() as tmp:
            for s in range(NOISE_SEEDS):
                for j, csv in enumerate(run_standin(self.scenario, self.path, params, out_dir=tmp, seed=s)):
                    record = trial_record(self.scenario, read_log(self.scenario, csv))
                    logged_obj[s, j] = record.objective
                    logged_margin[s, j] = record.features[MARGIN]
        out = {}
        for key, logged, ref in (("objective", logged_obj, clean.objective[stood]),
                                 ("margin", logged_margin, clean.margin[stood])):
            out[f"{key}_offset"] = float(np.nanmean(logged - ref))
            out[f"{key}_sd"] = float(np.sqrt(np.nanmean(np.nanvar(logged, axis=0, ddof=1))))
        out["points"] = int(stood.size)
        out["seeds"] = NOISE_SEEDS
        CACHE.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(out, indent=2) + "\n")
        return out

    # ---- best achievable and random median ---------------------------------------------------------
    def reference(self, n_design: int, refine_rounds: int) -> dict[str, float]:
        """``{"best", "random_median", "best_design", ...}`` on the safe box (cached, see module docstring)."""
        key = f"reference_{self.name}_{self.scenario.content_hash}_{n_design}_{refine_rounds}"
        path = CACHE / f"{key}.npz"
        if path.exists():
            data = np.load(path)
            return {k: float(data[k]) for k in ("best", "random_median", "best_design", "fall_fraction")} | {
                "x_best": data["x_best"]}
        U = safe_sobol(self.scenario, n_design, seed=11)
        out = self.evaluate(U)
        random_median = float(np.median(out.scored))
        best_design = float(np.nanmin(out.objective))
        order = np.argsort(np.where(out.fell, np.inf, out.objective))[:REFINE_INCUMBENTS]
        x, f = U[order].copy(), out.objective[order].copy()
        rng = np.random.default_rng(12)
        low, high = self.safe[:, 0], self.safe[:, 1]
        step = np.full(len(f), 0.05)
        for _ in range(refine_rounds):
            trial = x[:, None, :] + step[:, None, None] * (high - low) * rng.standard_normal(
                (len(f), REFINE_STEPS, U.shape[1]))
            trial = np.clip(trial, low, high).reshape(-1, U.shape[1])
            res = self.evaluate(trial)
            value = np.where(res.fell, np.inf, res.objective).reshape(len(f), REFINE_STEPS)
            j = np.argmin(value, axis=1)
            better = value[np.arange(len(f)), j] < f
            x[better] = trial.reshape(len(f), REFINE_STEPS, -1)[better, j[better]]
            f[better] = value[better, j[better]]
            # one-fifth rule per incumbent: widen after a success, narrow after a failure
            step = np.clip(np.where(better, step * 1.5, step * 0.7), 0.002, 0.3)
        i = int(np.argmin(f))
        data = {"best": float(f[i]), "random_median": random_median, "best_design": best_design,
                "fall_fraction": float(out.fell.mean()), "x_best": x[i]}
        CACHE.mkdir(parents=True, exist_ok=True)
        np.savez(path, **data)
        return data


def safe_sobol(scenario: Scenario, n: int, seed: int) -> np.ndarray:
    """``(n x dim)`` scrambled Sobol points (scipy.stats.qmc) uniform in the safe box, unit cube of the full bounds."""
    safe = safe_unit_bounds(scenario)
    sobol = qmc.Sobol(scenario.dim, scramble=True, seed=np.random.default_rng(seed))
    u = sobol.random_base2(int(np.ceil(np.log2(max(n, 2)))))[:n]
    return safe[:, 0] + u * (safe[:, 1] - safe[:, 0])
