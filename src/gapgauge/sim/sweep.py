"""The resumable, chunked simulation sweep: its arguments, its summary and the two ways to run chunks
(local threads, a Dask cluster). The store side (which rows are missing, one transaction per chunk)
is :func:`gapgauge.app.sweep.sweep`.

A sweep is a run of kind ``sweep`` in the store, identified by (what it simulates, seed, design,
planned count, nominal): running the same command again finds the same run, and so does a scenario
whose hardware map, shift thresholds, objective weights or description were edited since (the
simulation hash, :mod:`gapgauge.scenario.identity`). The design is a pure
function of the seed (:mod:`gapgauge.sim.design`) and rollout ``i``'s physics draw depends only on
``(seed, i)`` (:func:`gapgauge.sim.physics.draw_physics`), so the rows still missing can be
simulated in any chunking, order or place and give the rows an uninterrupted run would have given.

Each chunk of indices not yet stored is simulated (features only, no trajectories kept, so memory
stays flat whatever the number of rollouts) and written in ONE transaction; a crash, Ctrl-C or
kill -9 loses at most the chunk in flight. On a Dask cluster, workers simulate chunks (they get the
scenario path and hash, the chunk's parameters, physics draws and indices, and load the scenario
themselves) while the client writes the store, so the store never leaves the client's machine.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import GapgaugeError, ScenarioError
from ..records import RolloutBatch
from ..results import Result
from ..scenario import Scenario, load_scenario
from .controller import check_controller
from .design import DESIGNS
from .model import model_layout
from .rollout import simulate, simulate_chunks

#: rollouts per chunk (one store transaction): a few seconds of simulation on two cores, so progress
#: moves smoothly, an interruption loses little, and per-chunk costs stay small (see benchmarks/).
DEFAULT_CHUNK = 256
MAX_SEED = 2**63 - 1  # SQLite INTEGER
#: the whole design is held in memory (rollouts x dim x 8 bytes: 104 MB at 10^6 x 13), so a run is capped;
#: more rollouts go in further runs with other seeds
MAX_ROLLOUTS = 1_000_000


@dataclass
class SweepSummary(Result):
    """What a sweep did and what its run holds.

    Counts (``done``, ``ok``, ``fell``, ``diverged``, ``best_*``) are over the whole run as stored,
    including chunks of earlier, interrupted invocations; ``ran_now``, ``wall_seconds`` and
    ``rollouts_per_second`` are about this invocation only.
    """

    run_id: int
    scenario: str
    store: str
    design: str
    seed: int
    nominal: bool
    planned: int
    done: int
    ran_now: int
    ok: int
    fell: int
    diverged: int
    best_objective: float | None  # lowest objective among ok rollouts (lower is better)
    best_params: dict[str, float]  # parameter name -> value (scenario units) of that rollout
    wall_seconds: float
    rollouts_per_second: float
    nothing_to_do: bool
    units: dict[str, str] = field(default_factory=dict)  # parameter name -> unit
    stale: list[str] = field(default_factory=list)  # earlier runs of these settings it could not use, and why

    kind = "sweep"
    schema_version = 1


def check_model(scenario: Scenario) -> None:
    """Compile and check the scenario's MJCF (cached), so a model MuJoCo cannot use (not XML, an
    ``<include>`` that is missing, a joint of the channel map it lacks...) is one :class:`ScenarioError` line
    before any work, not a crash later. :func:`gapgauge.scenario.load_scenario` has done it once already;
    this catches a model file edited since. A callable controller is loaded and bound here too
    (:func:`gapgauge.sim.controller.check_controller`), before the store is touched."""
    model_layout(scenario)  # raises ScenarioError for a model MuJoCo cannot use
    check_controller(scenario)


def check_arguments(rollouts: Any, design: str, seed: Any, workers: Any, chunk_size: Any) -> None:
    def whole(value: Any) -> bool:
        return isinstance(value, (int, np.integer)) and not isinstance(value, bool)

    if not whole(rollouts) or not 1 <= rollouts <= MAX_ROLLOUTS:
        raise GapgaugeError(f"rollouts: must be a whole number from 1 to {MAX_ROLLOUTS:,}, got {rollouts!r}; "
                            "for more, run further sweeps with other seeds")
    if design not in DESIGNS:
        raise GapgaugeError(f"design: unknown design {design!r}; use one of {', '.join(DESIGNS)}")
    if not whole(seed) or not 0 <= seed <= MAX_SEED:
        raise GapgaugeError(f"seed: must be a whole number in 0..{MAX_SEED}, got {seed!r}; e.g. 0")
    for name, value in (("workers", workers), ("chunk_size", chunk_size)):
        if value is not None and (not whole(value) or value < 1):
            raise GapgaugeError(f"{name}: must be a whole number of at least 1, got {value!r}; or leave it out")


def run_local(
    scenario: Scenario, chunks: list[np.ndarray], payload: Callable, write: Callable[[RolloutBatch], int],
    advance: Callable[[int], None], workers: int | None,
) -> int:
    """Simulate the chunks through one pipeline (:func:`gapgauge.sim.rollout.simulate_chunks`: MuJoCo's
    threads step one sub-batch while this thread builds the next and measures the last), writing each
    chunk as soon as it is measured; the write, too, overlaps the stepping."""
    nthread = workers or os.cpu_count() or 1
    ran = 0
    for batch in simulate_chunks(scenario, (payload(indices) for indices in chunks), nthread=nthread):
        done = write(batch)
        ran += done
        advance(done)
    return ran


def simulate_remote(scenario_path: str, simulation_hash: str, params: np.ndarray, physics: np.ndarray,
                    indices: np.ndarray, nthread: int) -> RolloutBatch:
    """The task a Dask worker runs: load the scenario from its path, check it simulates what the client's
    does (simulation hash: model files, task, parameters, physics, controller, features), simulate one
    chunk. Arrays as in :func:`gapgauge.sim.rollout.simulate`."""
    scenario = load_scenario(scenario_path)
    if scenario.simulation_hash != simulation_hash:
        raise ScenarioError(
            f"{scenario_path}: the Dask worker's copy of the scenario (its model, controller or simulated "
            f"tables) differs from the client's (simulation hash {scenario.simulation_hash} != {simulation_hash}); "
            "give the workers the same files"
        )
    return simulate(scenario, params, physics, indices=indices, nthread=nthread)


def connect(dask: Any) -> tuple[Any, bool]:
    """A ``distributed.Client`` for ``dask`` (an address, or a client given by the caller) and whether
    this sweep opened it (and so closes it)."""
    try:
        from distributed import Client  # optional extra (cluster); loaded only for a Dask sweep
    except ImportError:
        raise GapgaugeError(
            "dask: Dask distributed is not installed; pip install 'gapgauge[cluster]' or run locally"
        ) from None
    if isinstance(dask, Client):
        return dask, False
    try:
        return Client(dask, timeout="20s"), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise GapgaugeError(f"dask {dask}: cannot reach the scheduler ({exc}); check the address") from None


def run_dask(
    client: Any, scenario: Scenario, chunks: list[np.ndarray], payload: Callable,
    write: Callable[[RolloutBatch], int], advance: Callable[[int], None], workers: int | None,
) -> int:
    """Workers simulate chunks; results are written here as they arrive. At most two chunks per
    worker thread are in flight, so neither side's memory grows with the sweep; the count follows the
    workers connected now, since a batch cluster's workers arrive (and leave) while the sweep runs.

    A worker that dies mid-chunk (killed, out of memory, its node lost) loses its chunks in flight; the
    scheduler runs them again elsewhere and each is written once (rows are unique on run and index)."""
    from distributed import as_completed  # optional extra (cluster); loaded only for a Dask sweep

    ran = 0
    in_flight = 0
    futures = as_completed()
    queue = iter(chunks)

    def top_up() -> None:
        nonlocal in_flight
        wanted = 2 * max(1, sum(client.nthreads().values()))
        while in_flight < wanted and (indices := next(queue, None)) is not None:
            futures.add(client.submit(simulate_remote, str(scenario.path), scenario.simulation_hash,
                                      *payload(indices), workers or 1, pure=False))
            in_flight += 1

    try:
        top_up()
        for future in futures:
            in_flight -= 1
            batch = future.result()
            future.release()
            ran += write(batch)
            advance(len(batch))
            top_up()
    except BaseException:
        for future in list(futures.futures):
            future.cancel()
        raise
    return ran


