"""What the report says: the results gathered from the store, and the verdict with the next step.

:func:`collect` reads everything the report shows from a store (duck-typed: ``info``, ``runs``,
``rollouts``, ``trials``, ``load_model``), tolerating missing results. :func:`decide` turns the
results into one verdict and one recommended next step, in plain words and with the reasons, by the
rules written out in its docstring. :func:`summary_json` is the JSON written beside the HTML.
Nothing here draws or renders.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import platform
import shlex
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..version import __version__
from ..errors import StoreError
from ..records import RolloutBatch, TrialRecord
from ..scenario import Scenario
from ..store.codec import jsonable

RESULT_KINDS = ("shift", "prior", "proposals", "budget", "calibration")
DEFAULT_STORE_NAME = "gapgauge.sqlite"
VERDICT_WORDS = {
    "carries_over": "carries over",
    "offset_order_kept": "offset, order kept",
    "does_not_carry_over": "does not carry over",
    "undecided": "not enough trials yet",
}
SECTION_TITLES = {
    "sweep": "The simulation sweep",
    "trials": "Hardware trials",
    "shift": "Feature shift: does simulation carry over?",
    "prior": "The multi-fidelity prior",
    "proposals": "Proposed next trials",
    "budget": "Trial budget",
    "calibration": "Simulator calibration",
}
# Below this lower end of rho's interval the simulation level tells the prior almost nothing.
RHO_HEALTHY_LOW = 0.0


@dataclass(frozen=True)
class SectionStatus:
    """Whether a report section has its data, and the command that would fill it if not."""

    name: str
    title: str
    filled: bool
    fill_command: str | None


@dataclass(frozen=True)
class Decision:
    """The first screen: a verdict and the recommended next step, with the reasons.

    level: ``go`` (to hardware), ``caution``, ``stop`` (fix the simulator first) or ``pending``
    (a step of the workflow has not been run yet).
    """

    verdict: str
    level: str
    next_step: str
    command: str | None
    reasons: tuple[str, ...]


@dataclass
class ReportData:
    """Everything the report shows, read once from the store."""

    scenario: Scenario
    store_path: str
    info: dict[str, Any]
    runs: list[dict[str, Any]]
    rollouts: RolloutBatch | None
    trials: list[TrialRecord]
    results: dict[str, dict[str, Any] | None]
    arrays: dict[str, dict[str, np.ndarray]]
    store: Any = field(default=None, repr=False)  # the store read, for models the report evaluates
    generated_at: str = field(
        default_factory=lambda: _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    )

    @property
    def scenario_arg(self) -> str:
        return _relative(self.scenario.path)

    def command(self, verb: str, *extra: str) -> str:
        """A command line for this scenario and store, ready to paste."""
        words = ["gapgauge", verb, self.scenario_arg, *extra]
        if self.store_path and _relative(self.store_path) != DEFAULT_STORE_NAME:
            words += ["--store", _relative(self.store_path)]
        return " ".join(shlex.quote(w) if i >= 2 else w for i, w in enumerate(words))


def _relative(path: str | Path) -> str:
    try:
        return str(Path(path).resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(path)


def as_dict(value: Any) -> dict[str, Any]:
    """A plain dict from a dict, a dataclass or an object with attributes (store rows come in any)."""
    if value is None:
        return {}
    if isinstance(value, dict):
        return dict(value)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: getattr(value, f.name) for f in dataclasses.fields(value)}
    if hasattr(value, "_asdict"):
        return dict(value._asdict())
    if hasattr(value, "keys"):
        return {k: value[k] for k in value.keys()}
    return {k: v for k, v in vars(value).items() if not k.startswith("_")}


def collect(scenario: Scenario, store: Any) -> ReportData:
    """Read what the report shows for ``scenario`` from ``store``; missing pieces become None / empty."""
    h = scenario.content_hash
    info = as_dict(store.info()) if hasattr(store, "info") else {}
    runs_raw = store.runs() if hasattr(store, "runs") else []
    runs = [as_dict(r) for r in runs_raw]
    runs = [r for r in runs if r.get("scenario_hash") in (None, h)]
    try:
        rollouts = store.rollouts(h)
    except StoreError:  # the store has never seen this scenario: nothing swept yet
        rollouts = None
    if rollouts is not None and len(rollouts) == 0:
        rollouts = None
    if rollouts is not None and rollouts.run_ids is not None and runs:
        # Only sweep rows show the coverage of the space; matched runs sit on the trials' parameters.
        sweep_ids = [r["id"] for r in runs if r.get("kind") == "sweep" and "id" in r]
        if sweep_ids:
            mask = np.isin(rollouts.run_ids, sweep_ids)
            rollouts = rollouts.subset(mask) if mask.any() else None
    trials = list(store.trials(h))
    results: dict[str, dict[str, Any] | None] = {}
    arrays: dict[str, dict[str, np.ndarray]] = {}
    for kind in RESULT_KINDS:
        loaded = store.load_model(kind, h)
        if loaded is None:
            results[kind] = None
            continue
        params, arr = loaded
        if isinstance(params, dict) and "rho" not in params and isinstance(params.get("summary"), dict):
            params = {**params["summary"], "model_state_keys": sorted(k for k in params if k != "summary")}
        results[kind] = params if isinstance(params, dict) else None
        arrays[kind] = dict(arr or {})
    path = getattr(store, "path", None) or info.get("path") or ""
    data = ReportData(scenario, str(path), info, runs, rollouts, trials, results, arrays)
    data.store = store
    return data


# ---- reading the results tolerantly ----------------------------------------------------------


def number(value: Any) -> float | None:
    """A finite float, or None for anything else (missing keys, NaN, text)."""
    if isinstance(value, bool) or value is None:
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def interval(value: Any) -> tuple[float, float] | None:
    if isinstance(value, dict):
        value = [value.get("low", value.get("lower")), value.get("high", value.get("upper"))]
    if isinstance(value, (list, tuple)) and len(value) == 2:
        low, high = number(value[0]), number(value[1])
        if low is not None and high is not None:
            return low, high
    return None


def shift_features(shift: dict[str, Any] | None) -> list[dict[str, Any]]:
    """The per-feature entries of a shift result: a list of ``{"name", "verdict", ...}`` (compare/shift.py)
    or a mapping name -> ``{"verdict", ...}`` (the before/after shifts of compare/calibration.py)."""
    features = shift.get("features") if isinstance(shift, dict) else None
    if isinstance(features, dict):
        return [{"name": name, **entry} for name, entry in features.items() if isinstance(entry, dict)]
    if isinstance(features, list):
        return [f for f in features if isinstance(f, dict)]
    return []


def shift_counts(shift: dict[str, Any] | None) -> dict[str, int]:
    counts = dict.fromkeys(VERDICT_WORDS, 0)
    for feature in shift_features(shift):
        verdict = feature.get("verdict")
        if verdict in counts:
            counts[verdict] += 1
    return counts


def trials_to_decide(shift: dict[str, Any] | None) -> int | None:
    """The largest 'more trials would decide' figure among undecided features, if the shift gives one."""
    best = None
    for feature in (shift or {}).get("features", []) or []:
        if not isinstance(feature, dict) or feature.get("verdict") != "undecided":
            continue
        for key in ("trials_needed", "more_trials", "additional_trials", "trials_to_decide"):
            value = number(feature.get(key))
            if value is not None:
                best = int(value) if best is None else max(best, int(value))
                break
    return best


def overlay_path(calibration: dict[str, Any]) -> str | None:
    """The calibrated overlay's path: ``overlay_path``, or ``overlay`` when it is a path, not TOML text."""
    for key in ("overlay_path", "overlay"):
        value = calibration.get(key)
        if isinstance(value, str) and value.strip() and "\n" not in value and value.endswith(".toml"):
            return value
    return None


def budget_figure(budget: dict[str, Any] | None, arm: str, key: str) -> float | None:
    return number(((budget or {}).get(arm) or {}).get(key))


def decide(data: ReportData) -> Decision:
    """The verdict and the next step, by these rules, first match wins:

    1. no sweep rollouts: run the sweep;
    2. no hardware trials: run the first trials from ``gapgauge propose``;
    3. no shift assessment: run ``gapgauge shift``;
    4. at least half of the decided features do not carry over: fix the simulator
       (``gapgauge calibrate``; if calibration has been run, sweep again on its overlay);
    5. most features undecided: run more trials (the shift says how many would decide);
    6. no prior: run ``gapgauge prior``;
    7. rho's interval reaches down to 0 (the simulation level does not inform hardware), or the prior's
       leave-one-out error is worse than hardware alone: tune on hardware with care, calibrate first
       if not done;
    8. otherwise go to hardware with the proposed trials (``gapgauge propose`` if there are none),
       quoting the budget's P80.
    """
    r = data.results
    n_rollouts = 0 if data.rollouts is None else len(data.rollouts)
    n_trials = len(data.trials)
    reasons: list[str] = []
    if n_rollouts == 0:
        return Decision(
            "No simulation sweep yet",
            "pending",
            "Run the simulation sweep first (overnight for a real study; a few thousand rollouts to try).",
            data.command("sweep", "--rollouts", "20000"),
            ("the store holds no simulated rollouts for this scenario",),
        )
    reasons.append(f"the sweep holds {n_rollouts:,} rollouts")
    if n_trials == 0:
        return Decision(
            "No hardware trials yet: simulation only",
            "pending",
            "Run the first 3 to 5 hardware trials: get them from the propose command, run them with a "
            "spotter, then take their logs in with gapgauge ingest.",
            data.command("propose", "--count", "5"),
            (*reasons, "nothing can be said about the robot until trials are in"),
        )
    reasons.append(f"{n_trials} hardware trial{'s' if n_trials != 1 else ''} in the store")
    shift = r.get("shift")
    if shift is None:
        return Decision(
            "Trials are in; carry-over not assessed yet",
            "pending",
            "Measure which features carry over from simulation to the robot.",
            data.command("shift"),
            tuple(reasons),
        )
    counts = shift_counts(shift)
    total = sum(counts.values())
    decided = total - counts["undecided"]
    bad = counts["does_not_carry_over"]
    bad_names = [
        f.get("name", "?")
        for f in shift.get("features", [])
        if isinstance(f, dict) and f.get("verdict") == "does_not_carry_over"
    ]
    reasons.append(
        f"of {total} features: {counts['carries_over']} carry over, {counts['offset_order_kept']} offset "
        f"with the order kept, {bad} do not carry over, {counts['undecided']} undecided"
    )
    calibration = r.get("calibration")
    if decided and bad * 2 >= decided:
        verdict = f"Simulation does not carry over ({bad} of {total} features: {', '.join(bad_names[:4])}" + (
            ", ...)" if len(bad_names) > 4 else ")"
        )
        if calibration is None:
            return Decision(
                verdict,
                "stop",
                "Fix the simulator before trusting its prior: calibrate its physics to the trials.",
                data.command("calibrate"),
                (
                    *reasons,
                    "a prior built on a simulator that misses these features would mislead the proposals",
                ),
            )
        overlay = overlay_path(calibration)
        after = calibration.get("shift_after")
        after_features = shift_features(after)
        if after_features:
            after_bad = shift_counts(after)["does_not_carry_over"]
            reasons.append(
                f"at the calibrated physics {after_bad} of {len(after_features)} matched features "
                "do not carry over"
            )
        pinned = [
            p.get("name")
            for p in calibration.get("parameters", [])
            if isinstance(p, dict) and p.get("identifiable")
        ]
        if pinned:
            reasons.append(f"calibration pinned down {', '.join(map(str, pinned))}")
        command = (
            f"gapgauge sweep {shlex.quote(_relative(overlay))}"
            if isinstance(overlay, str) and overlay
            else None
        )
        return Decision(
            verdict,
            "stop",
            "The simulator has been calibrated: sweep again on the calibrated physics, then re-assess "
            "the shift "
            "and refit the prior before going back to hardware.",
            command,
            tuple(reasons),
        )
    if counts["undecided"] * 2 >= total:
        more = trials_to_decide(shift)
        proposals = (r.get("proposals") or {}).get("proposals") or []
        step = "Run more hardware trials before judging carry-over"
        if more is not None:
            step += f": about {more} more would decide"
        if proposals:
            step += f"; the {len(proposals)} proposed trials below are a good next batch"
        return Decision(
            "Not enough trials yet to judge carry-over",
            "caution",
            step + ".",
            None if proposals else data.command("propose", "--count", "5"),
            tuple(reasons),
        )
    joint = shift.get("joint") if isinstance(shift.get("joint"), dict) else {}
    level = number((shift.get("settings") or {}).get("level")) or 0.05
    mmd_p = number(joint.get("mmd_p_value"))
    if mmd_p is not None and mmd_p < level:
        reasons.append(
            f"the joint test (MMD, p = {mmd_p:.3g}) finds simulation and hardware differ when all features "
            "are taken together"
        )
        if calibration is None:
            return Decision(
                "Features carry over one by one, but jointly simulation and hardware differ",
                "caution",
                "Calibrate the simulator's physics to the trials before leaning on the prior.",
                data.command("calibrate"),
                tuple(reasons),
            )
    prior = r.get("prior")
    if prior is None:
        return Decision(
            "Simulation carries over; no prior fitted yet",
            "pending",
            "Fit the multi-fidelity prior so hardware tuning starts from what simulation learned.",
            data.command("prior"),
            tuple(reasons),
        )
    rho = number(prior.get("rho"))
    rho_iv = interval(prior.get("rho_interval"))
    loo = prior.get("loo") or {}
    mf = number((loo.get("multi_fidelity") or {}).get("rmse"))
    hw = number((loo.get("hardware_only") or {}).get("rmse"))
    if rho is not None:
        reasons.append(
            f"rho = {rho:.3g}" + (f", interval [{rho_iv[0]:.3g}, {rho_iv[1]:.3g}]" if rho_iv else "")
        )
    weak_link = rho_iv is not None and rho_iv[0] <= RHO_HEALTHY_LOW
    worse_loo = mf is not None and hw is not None and mf > hw
    if worse_loo:
        reasons.append(f"leave-one-out RMSE with the prior {mf:.3g} is worse than hardware alone {hw:.3g}")
    offset = counts["offset_order_kept"] > counts["carries_over"]
    carry = "Simulation keeps the order of parameter sets, with an offset" if offset else "Simulation carries over"
    if weak_link or worse_loo:
        reasons.append("the simulation level does not yet inform hardware")
        return Decision(
            f"{carry}, but the prior does not help yet",
            "caution",
            "Tune on hardware with a cold-start budget in mind"
            + ("; calibrate the simulator first, it may restore the link" if calibration is None else "")
            + ".",
            data.command("calibrate") if calibration is None else data.command("propose"),
            tuple(reasons),
        )
    proposals = (r.get("proposals") or {}).get("proposals") or []
    budget = r.get("budget")
    verdict = carry
    if not proposals:
        return Decision(
            verdict,
            "go",
            "The prior is healthy: get the next trials under the fall-risk limit.",
            data.command("propose"),
            tuple(reasons),
        )
    p80 = budget_figure(budget, "with_prior", "p80")
    cold = budget_figure(budget, "cold_start", "p80")
    risk = max((number(p.get("fall_risk")) or 0.0) for p in proposals)
    step = f"Go to hardware with the {len(proposals)} proposed trials (highest modelled fall risk {risk:.3f})"
    if p80 is not None:
        step += f"; budget P80 = {p80:.0f} trials"
        if cold is not None:
            step += f" (cold start {cold:.0f})"
        command = None
    else:
        command = data.command("budget")
        step += "; plan the trial budget first"
    return Decision(verdict, "go", step + ".", command, tuple(reasons))


def section_statuses(data: ReportData) -> list[SectionStatus]:
    filled = {
        "sweep": data.rollouts is not None,
        "trials": bool(data.trials),
        **{kind: data.results.get(kind) is not None for kind in RESULT_KINDS},
    }
    commands = {
        "sweep": data.command("sweep", "--rollouts", "20000"),
        "trials": data.command("propose", "--count", "5")
        + "  (run them on the robot, then: "
        + data.command("ingest", "LOG.csv", "...")
        + ")",
        "shift": data.command("shift"),
        "prior": data.command("prior"),
        "proposals": data.command("propose"),
        "budget": data.command("budget"),
        "calibration": data.command("calibrate"),
    }
    return [
        SectionStatus(name, SECTION_TITLES[name], filled[name], None if filled[name] else commands[name])
        for name in SECTION_TITLES
    ]


def sweep_summary(data: ReportData) -> dict[str, Any]:
    batch = data.rollouts
    if batch is None:
        return {"total": 0}
    status = np.asarray(batch.status)
    out: dict[str, Any] = {
        "total": int(len(batch)),
        "ok": int(np.sum(status == "ok")),
        "fell": int(np.sum(status == "fell")),
        "diverged": int(np.sum(status == "diverged")),
    }
    ok = status == "ok"
    if ok.any():
        objective = np.where(ok, batch.objective, np.inf)
        best = int(np.argmin(objective))
        out["best_objective"] = float(batch.objective[best])
        out["best_params"] = data.scenario.params_to_mapping(batch.params[best])
    return out


def summary_json(
    data: ReportData, decision: Decision, sections: list[SectionStatus], caution: str
) -> dict[str, Any]:
    """The JSON written beside the HTML: every figure the first screen shows, and every result as stored."""
    prior = data.results.get("prior") or {}
    budget = data.results.get("budget")
    proposals = (data.results.get("proposals") or {}).get("proposals") or []
    seeds = sorted({r.get("seed") for r in data.runs if r.get("seed") is not None})
    return jsonable(
        {
            "tool_version": __version__,
            "generated_at": data.generated_at,
            "scenario": {
                "name": data.scenario.name,
                "path": str(data.scenario.path),
                "hash": data.scenario.content_hash,
            },
            "store": data.store_path,
            "verdict": decision.verdict,
            "level": decision.level,
            "next_step": decision.next_step,
            "next_command": decision.command,
            "reasons": list(decision.reasons),
            "figures": {
                "rollouts": sweep_summary(data),
                "trials": len(data.trials),
                "synthetic_trials": sum(1 for t in data.trials if t.synthetic),
                "rho": number(prior.get("rho")),
                "rho_interval": interval(prior.get("rho_interval")),
                "proposals": len(proposals),
                "budget_p80_with_prior": budget_figure(budget, "with_prior", "p80"),
                "budget_p80_cold_start": budget_figure(budget, "cold_start", "p80"),
                "shift_counts": shift_counts(data.results.get("shift"))
                if data.results.get("shift")
                else None,
            },
            "sections": {s.name: {"filled": s.filled, "fill_command": s.fill_command} for s in sections},
            "results": data.results,
            "trials": [
                {
                    "source_path": t.source_path,
                    "sha256": t.sha256,
                    "robot_id": t.robot_id,
                    "recorded_at": t.recorded_at,
                    "outcome": t.outcome,
                    "synthetic": t.synthetic,
                    "notes": t.notes,
                    "objective": t.objective,
                    "params": t.params,
                }
                for t in data.trials
            ],
            "provenance": {
                "runs": data.runs,
                "seeds": seeds,
                "python": platform.python_version(),
                "numpy": np.__version__,
            },
            "caution": caution,
        }
    )
