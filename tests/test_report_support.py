"""A small real store for the report tests: a synthetic sweep, five trials and every stored result.

The rollouts are a made-up landscape (no physics: the report only reads them), so the store builds in
well under a second. Results are stored in the JSON shapes the analysis issues specify (shift,
prior, proposals, budget, calibration), with the keys the report reads and no more.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from gapgauge.records import RolloutBatch, TrialRecord
from gapgauge.scenario import Scenario
from gapgauge.store import Store

REPO = Path(__file__).resolve().parents[1]
HOSTILE_ROBOT = "<script>alert(1)</script>"
HOSTILE_NOTE = '<img src=x onerror=alert(2)> & "quoted" </td></tr></table>'
HOSTILE_FILE = "trial_<b>bold<b>_<img src=x onerror=alert(3)>.csv"  # no slash: a file name
SHIFT_FEATURES = (
    "recovery_time",
    "peak_com_excursion",
    "cop_path_length",
    "sway_area",
    "margin_of_stability",
)


def sweep_batch(scenario: Scenario, n: int = 1500, seed: int = 0) -> RolloutBatch:
    """``n`` rollouts on a smooth made-up objective; low ankle stiffness falls, a few diverge."""
    rng = np.random.default_rng(seed)
    u = rng.random((n, scenario.dim))
    fell = (u[:, 0] < 0.25) & (rng.random(n) < 0.8)
    status = np.where(fell, "fell", "ok").astype("<U8")
    status[:4] = "diverged"
    objective = 1.0 + 3.0 * (u[:, 0] - 0.6) ** 2 + (u[:, 6] - 0.4) ** 2 + 0.05 * rng.standard_normal(n)
    objective = np.where(fell, scenario.objective.fall_value, objective)
    objective[:4] = np.nan
    features = {name: rng.random(n) for name in scenario.features.names}
    features["fell"] = fell.astype(float)
    physics = np.tile([r.nominal for r in scenario.physics], (n, 1))
    return RolloutBatch(
        np.arange(n),
        scenario.from_unit(u),
        physics,
        tuple(r.name for r in scenario.physics),
        status,
        np.where(status == "diverged", "nan in qpos", ""),
        objective,
        features,
    )


def trial_records(scenario: Scenario, count: int = 5, hostile: bool = False) -> list[TrialRecord]:
    out = []
    for i in range(count):
        x = scenario.from_unit(np.full((1, scenario.dim), 0.35 + 0.06 * i))[0]
        out.append(
            TrialRecord(
                scenario_hash=scenario.content_hash,
                source_path=f"/lab/logs/{HOSTILE_FILE if hostile and i == 0 else f'trial_{i:03d}.csv'}",
                sha256=f"{i:02d}" + "c0ffee" * 10 + "abcd",
                params=scenario.params_to_mapping(x),
                robot_id=HOSTILE_ROBOT if hostile else "biped-02",
                recorded_at=f"2024-05-0{i + 1}T09:30:00+00:00",
                outcome="stood" if i != 3 else "fell",
                notes=HOSTILE_NOTE if hostile and i == 1 else f"trial {i}, harness on",
                synthetic=True,
                features={"fell": float(i == 3)},
                objective=1.2 + 0.1 * i if i != 3 else scenario.objective.fall_value,
                ingested_at="2024-05-06T10:00:00+00:00",
                tool_version="0.1.0",
            )
        )
    return out


def results(
    scenario: Scenario, trials: list[TrialRecord], verdicts: tuple[str, ...] | None = None
) -> dict[str, dict]:
    """Every stored result, in the shapes of the shift, prior, budget and calibration issues."""
    verdicts = verdicts or ("carries_over", "offset_order_kept", "carries_over", "undecided", "carries_over")
    rng = np.random.default_rng(1)
    proposals = []
    for i in range(5):
        u = 0.3 + 0.4 * rng.random((1, scenario.dim))
        proposals.append(
            {
                "params": scenario.params_to_mapping(scenario.from_unit(u)[0]),
                "predicted_objective": 1.1 + 0.02 * i,
                "predicted_sd": 0.2,
                "fall_risk": 0.01 * i,
                "reason": "expected improvement x P(no fall), kriging believer batch",
            }
        )
    return {
        "shift": {
            "settings": {"level": 0.05, "residual_limit": 2.0},
            "features": [
                {
                    "name": name,
                    "verdict": verdict,
                    "reason": f"{name}: residuals within the limit",
                    "n_trials": len(trials),
                    "bias": 0.1,
                    "bias_test_interval": [0.0, 0.2],
                    "rank": {"kendall": 0.6},
                    "more_trials": 4 if verdict == "undecided" else None,
                    "hardware": [1.0] * len(trials),
                    "simulated_mean": [1.1] * len(trials),
                    "simulated_sd": [0.1] * len(trials),
                    "residuals": [-1.0] * len(trials),
                }
                for name, verdict in zip(SHIFT_FEATURES, verdicts, strict=False)
            ],
            "joint": {"mmd_p_value": 0.21, "classifier_auc": 0.58, "classifier_auc_interval": [0.41, 0.75]},
        },
        "prior": {
            "rho": 0.93,
            "rho_interval": [0.61, 1.24],
            "fit_seconds": 2.5,
            "loo": {
                "multi_fidelity": {"rmse": 0.11, "log_predictive_density": 0.4},
                "hardware_only": {"rmse": 0.31, "log_predictive_density": -0.6},
                "simulation_only": {"rmse": 0.2, "log_predictive_density": 0.1},
            },
        },
        "proposals": {"proposals": proposals},
        "budget": {
            "with_prior": {"p50": 6, "p80": 9, "p95": 13, "expected_falls": 0.3},
            "cold_start": {"p50": 15, "p80": 22, "p95": 30, "expected_falls": 1.4},
            "curve": [
                {"trials": n, "with_prior": min(1.0, n / 11), "cold_start": min(1.0, n / 27)}
                for n in range(1, 31)
            ],
            "seed": 0,
        },
        "calibration": {
            "parameters": [
                {"name": "friction", "estimate": 0.62, "interval": [0.56, 0.7], "identifiable": True},
                {"name": "joint_damping", "estimate": 0.4, "interval": [0.1, 0.95], "identifiable": False},
            ],
            "shift_before": {
                "features": {n: {"rms": 2.9, "verdict": "does_not_carry_over"} for n in SHIFT_FEATURES},
                "total": 8.4,
            },
            "shift_after": {
                "features": {n: {"rms": 0.8, "verdict": "carries_over"} for n in SHIFT_FEATURES},
                "total": 0.7,
            },
            "overlay": "push_recovery.calibrated.toml",
        },
    }


def build_store(
    scenario: Scenario,
    path: Path,
    *,
    hostile: bool = False,
    sweep: bool = True,
    trials: int = 5,
    kinds: tuple[str, ...] = ("shift", "prior", "proposals", "budget", "calibration"),
    verdicts: tuple[str, ...] | None = None,
) -> Store:
    """A real store at ``path`` holding a sweep, ``trials`` trials and the results named in ``kinds``,
    written through the Store's own methods."""
    store = Store(path)
    store.add_scenario(scenario)
    if sweep:
        batch = sweep_batch(scenario)
        run_id = store.start_run("sweep", scenario, seed=7, design="sobol", planned=len(batch), nominal=False)
        store.write_rollouts(run_id, batch)
        store.finish_run(run_id)
    records = trial_records(scenario, trials, hostile)
    for record in records:
        store.add_trial(record)
    stored = results(scenario, records, verdicts)
    for kind in kinds:
        store.save_model(kind, scenario.content_hash, params=stored[kind])
    return store
