"""The overnight sweep as a job: find (or start) the run in the store, simulate the rows still missing,
write each chunk in one transaction, summarise what the run holds."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np

from ..progress import Progress, or_silent
from ..records import RolloutBatch
from ..scenario import Scenario
from ..sim.design import make_design
from ..sim.physics import draw_physics
from ..sim.sweep import DEFAULT_CHUNK, SweepSummary, check_arguments, check_model, connect, run_dask, run_local
from ..store import Store
from .common import as_scenario, open_store

STAGE = "sweep: rollouts"


def sweep(
    scenario: Scenario | str | Path,
    rollouts: int,
    *,
    design: str = "sobol",
    seed: int = 0,
    store: Store | str | Path = "gapgauge.sqlite",
    workers: int | None = None,
    dask: Any = None,
    nominal: bool = False,
    chunk_size: int | None = None,
    progress: Progress | None = None,
) -> SweepSummary:
    """Run (or resume) a sweep of ``rollouts`` simulations over the scenario's parameter space.

    A sweep is a run of kind ``sweep`` identified by (simulation hash, seed, design, planned count,
    nominal): the same call again finds the same run and simulates only the rows still missing, and so
    does the call on a scenario whose hardware map, shift thresholds, objective weights or description
    were edited (the objective is then recomputed from the stored features). A run of the same settings
    measured with other feature definitions is stale: it is named in ``SweepSummary.stale`` with why. The
    design is a pure function of the seed and rollout ``i``'s physics draw depends only on ``(seed, i)``,
    so any chunking, order or worker gives the rows an uninterrupted run would have given.

    Args:
        scenario: a loaded :class:`Scenario` or the path of its TOML file.
        rollouts: planned number of rollouts (the design size), at least 1.
        design: ``"sobol"`` | ``"lhs"`` | ``"random"`` (see :mod:`gapgauge.sim.design`).
        seed: non-negative integer; fixes the design and every physics draw.
        store: a :class:`~gapgauge.store.Store` or the path of its file (created if missing).
        workers: simulation threads (local) or MuJoCo threads per Dask task; default all local cores,
            1 per Dask task.
        dask: a Dask scheduler address (``"tcp://host:8786"``) or a ``distributed.Client``; None runs locally.
        nominal: use the nominal physics for every rollout instead of random draws.
        chunk_size: rollouts per chunk (one store transaction); default :data:`DEFAULT_CHUNK`.
        progress: ``progress(stage, done, total)`` after each chunk (``done`` counts the whole run).

    Returns:
        A :class:`SweepSummary`; ``nothing_to_do`` is true when the run was already complete.
    """
    scenario = as_scenario(scenario)
    check_arguments(rollouts, design, seed, workers, chunk_size)
    check_model(scenario)  # before the store is touched: a bad model leaves no run behind
    report = or_silent(progress)
    chunk = int(chunk_size or DEFAULT_CHUNK)
    with open_store(store, must_exist=False) as db:
        run_id = db.start_run("sweep", scenario, seed=seed, design=design, planned=rollouts, nominal=nominal)
        stale = db.stale_runs(scenario, "sweep", seed=seed, design=design, planned=rollouts, nominal=nominal)
        todo = np.setdiff1d(np.arange(rollouts, dtype=np.int64), db.done_indices(run_id))
        start = time.perf_counter()
        ran = 0
        if todo.size:
            params = make_design(scenario, rollouts, design, seed)
            chunks = [todo[i:i + chunk] for i in range(0, todo.size, chunk)]
            done = rollouts - int(todo.size)
            report(STAGE, done, rollouts)

            def payload(indices: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
                return params[indices], draw_physics(scenario, seed, indices, nominal=nominal), indices

            def write(batch: RolloutBatch) -> int:
                db.write_rollouts(run_id, batch)
                return len(batch)

            def advance(n: int) -> None:
                nonlocal done
                done += n
                report(STAGE, done, rollouts)

            client, own_client = connect(dask) if dask is not None else (None, False)
            try:
                if client is None:
                    ran = run_local(scenario, chunks, payload, write, advance, workers)
                else:
                    ran = run_dask(client, scenario, chunks, payload, write, advance, workers)
            finally:
                if own_client:
                    client.close()
        wall = time.perf_counter() - start
        db.finish_run(run_id)
        summary = summarise(db, scenario, run_id, ran, wall, todo.size == 0)
        summary.stale = stale
        return summary


def summarise(db: Store, scenario: Scenario, run_id: int, ran: int, wall: float, nothing: bool) -> SweepSummary:
    """The :class:`SweepSummary` of run ``run_id`` as stored, with this invocation's ``ran`` rows in ``wall`` s."""
    run = db.run(run_id)
    stats = db.run_summary(run_id, scenario.content_hash)  # the objective as this scenario weighs it
    best = stats["best_params"]
    return SweepSummary(
        run_id=run_id, scenario=scenario.name, store=str(db.path), design=run.design, seed=run.seed,
        nominal=run.nominal, planned=run.planned, done=run.done, ran_now=ran, ok=stats["ok"], fell=stats["fell"],
        diverged=stats["diverged"], best_objective=stats["best_objective"],
        best_params={} if best is None else scenario.params_to_mapping(best),
        wall_seconds=wall, rollouts_per_second=ran / wall if wall > 0 and ran else 0.0, nothing_to_do=nothing,
        units={p.name: p.unit for p in scenario.parameters},
    )
