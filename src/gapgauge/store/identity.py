"""Run identity: which stored runs a scenario version can use, which are stale and why, and the objective
recomputed from stored features when the weights changed (:mod:`gapgauge.scenario.identity`).

A run belongs to every scenario version with the same simulation hash as the version that started it
(:data:`gapgauge.store.queries.SAME_SIMULATION`). Its stored objective was computed with that version's
``[objective]``; a version with other weights reads it recomputed from the stored features
(:func:`recompute_objective`), so editing the weights never needs a new sweep. A run with the same
trajectory hash but another simulation hash simulated the same thing but was measured with other feature
definitions: its trajectories are not kept, so it is stale, and :func:`run_usability` says why.
"""

from __future__ import annotations

import json
import sqlite3
from typing import Any

import numpy as np

from ..records import RolloutBatch, TrialRecord
from ..scenario.identity import explain_difference
from ..scenario.types import Objective


def objective_definition(scenario: Any) -> dict[str, Any]:
    """The ``[objective]`` of a scenario as stored: ``{"weights": {...}, "fall_value": float}``."""
    return {"weights": dict(scenario.objective.weights), "fall_value": float(scenario.objective.fall_value)}


def _version(conn: sqlite3.Connection, scenario_hash: str) -> tuple[str | None, str | None, dict, dict]:
    """``(simulation_hash, trajectory_hash, identity, objective)`` of a stored version."""
    row = conn.execute("SELECT simulation_hash, trajectory_hash, identity_json, objective_json FROM scenarios"
                       " WHERE hash = ?", (scenario_hash,)).fetchone()
    if row is None:
        return None, None, {}, {}
    return row[0], row[1], json.loads(row[2] or "{}"), json.loads(row[3] or "{}")


def run_usability(conn: sqlite3.Connection, scenario: Any) -> list[dict[str, Any]]:
    """Every run of the store as a (loaded, maybe not stored) scenario sees it: ``{"id", "kind",
    "scenario", "scenario_hash", "status": "usable" | "stale" | "other", "why"}``; ``why`` says what differs
    (for a stale run: the feature definitions; for a run of another version of the same scenario name: the
    simulation). Runs of other scenarios are left out."""
    scenario_hash, sim, traj = scenario.content_hash, scenario.simulation_hash or None, scenario.trajectory_hash
    identity = scenario.identity or {}
    out = []
    for rid, kind, run_hash, name, r_sim, r_traj, r_identity in conn.execute(
        "SELECT r.id, r.kind, r.scenario_hash, s.name, s.simulation_hash, s.trajectory_hash, s.identity_json"
        " FROM runs r JOIN scenarios s ON s.hash = r.scenario_hash ORDER BY r.id"
    ).fetchall():
        theirs = json.loads(r_identity or "{}")
        if run_hash == scenario_hash or (sim is not None and r_sim == sim):
            status, why = "usable", ""
        elif traj is not None and r_traj == traj:
            status = "stale"
            why = ("same simulations, other feature definitions (" + explain_difference(theirs, identity)
                   + "); its trajectories were not kept, so its features cannot be recomputed: sweep again")
        elif name == scenario.name:
            status = "other"
            why = ("another simulation (" + explain_difference(theirs, identity) + ")" if theirs and identity
                   else "another version of the scenario (stored before runs were keyed by simulation)")
        else:
            continue
        out.append({"id": int(rid), "kind": kind, "scenario": name, "scenario_hash": run_hash, "status": status,
                    "why": why})
    return out


def stale_like(conn: sqlite3.Connection, scenario: Any, kind: str, seed: int, design: str,
               planned: int, nominal: bool) -> list[str]:
    """One line per stale run (see :func:`run_usability`) with the same kind, seed, design, size and
    physics as the run about to be started: the command says which earlier run it cannot use and why."""
    stale = {u["id"]: u["why"] for u in run_usability(conn, scenario) if u["status"] == "stale"}
    if not stale:
        return []
    rows = conn.execute(
        f"SELECT id FROM runs WHERE kind = ? AND seed = ? AND design = ? AND planned = ? AND nominal = ?"
        f" AND id IN ({','.join('?' * len(stale))}) ORDER BY id",
        (kind, int(seed), str(design), int(planned), int(bool(nominal)), *stale),
    ).fetchall()
    return [f"run {rid} is stale: {stale[rid]}" for (rid,) in rows]


def recompute_objective(conn: sqlite3.Connection, scenario_hash: str, batch: RolloutBatch) -> RolloutBatch:
    """``batch`` (read from the store) with the objective of every row whose run was written under other
    ``[objective]`` settings recomputed from its stored features with those of ``scenario_hash``
    (NaN where diverged). Rows of runs with the same objective are left as stored."""
    if batch.run_ids is None or not len(batch):
        return batch
    _, _, _, mine = _version(conn, scenario_hash)
    if not mine:
        return batch
    runs = np.unique(batch.run_ids)
    marks = ",".join("?" * len(runs))
    defined = dict(conn.execute(
        f"SELECT r.id, s.objective_json FROM runs r JOIN scenarios s ON s.hash = r.scenario_hash WHERE r.id IN"
        f" ({marks})", [int(r) for r in runs]).fetchall())
    other = [r for r in runs if json.loads(defined.get(int(r)) or "{}") != mine]
    if not other:
        return batch
    rows = np.isin(batch.run_ids, other)
    objective = Objective(weights=dict(mine["weights"]), fall_value=float(mine["fall_value"]))
    sub = {name: values[rows] for name, values in batch.features.items()}
    missing = [name for name in (*objective.weights, "fell") if name not in sub]
    if missing:  # cannot happen for versions with the same simulation hash (the feature names are in it)
        return batch
    fresh = np.asarray(objective.evaluate(sub), dtype=float)
    fresh[batch.status[rows] == "diverged"] = np.nan
    values = batch.objective.copy()
    values[rows] = fresh
    batch.objective = values
    return batch


def recompute_trial_objectives(conn: sqlite3.Connection, scenario_hash: str,
                               trials: list[TrialRecord]) -> list[TrialRecord]:
    """Trials stored under another version's ``[objective]`` get the objective of ``scenario_hash``,
    recomputed from their stored features."""
    _, _, _, mine = _version(conn, scenario_hash)
    if not mine:
        return trials
    objective = Objective(weights=dict(mine["weights"]), fall_value=float(mine["fall_value"]))
    cache: dict[str, dict] = {}
    for trial in trials:
        if trial.scenario_hash == scenario_hash:
            continue
        if trial.scenario_hash not in cache:
            cache[trial.scenario_hash] = _version(conn, trial.scenario_hash)[3]
        features = {k: np.array([v], dtype=float) for k, v in trial.features.items()}
        if cache[trial.scenario_hash] != mine and all(n in features for n in (*objective.weights, "fell")):
            trial.objective = float(np.asarray(objective.evaluate(features), dtype=float)[0])
    return trials


def summary(batch: RolloutBatch) -> dict[str, Any]:
    """Counts by status and the best (lowest-objective) ok row of one run's rows, as
    :meth:`gapgauge.store.Store.run_summary` gives them (rows ordered by index: a tie goes to the first)."""
    out: dict[str, Any] = {s: int(np.sum(batch.status == s)) for s in ("ok", "fell", "diverged")}
    out.update(best_objective=None, best_index=None, best_params=None)
    ok = np.flatnonzero((batch.status == "ok") & np.isfinite(batch.objective))
    if ok.size:
        i = int(ok[np.argmin(batch.objective[ok])])
        out.update(best_index=int(batch.indices[i]), best_objective=float(batch.objective[i]),
                   best_params=batch.params[i].copy())
    return out
