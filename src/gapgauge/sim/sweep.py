"""The resumable, chunked simulation sweep, on local threads or a Dask cluster, writing to the store.

A sweep is a run of kind ``sweep`` in the store, identified by (scenario version, seed, design,
planned count, nominal): running the same command again finds the same run. The design is a pure
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
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import GapgaugeError, ScenarioError
from ..records import RolloutBatch
from ..scenario import Scenario, load_scenario
from ..store import Store
from .design import DESIGNS, make_design
from .physics import draw_physics

#: rollouts per chunk (one store transaction): a few seconds of simulation on two cores, so progress
#: moves smoothly, an interruption loses little, and per-chunk costs stay small (see benchmarks/).
DEFAULT_CHUNK = 256
MAX_SEED = 2**63 - 1  # SQLite INTEGER
#: the whole design is held in memory (rollouts x dim x 8 bytes: 104 MB at 10^6 x 13), so a run is capped;
#: more rollouts go in further runs with other seeds
MAX_ROLLOUTS = 1_000_000


@dataclass
class SweepSummary:
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

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


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
    progress: bool = True,
) -> SweepSummary:
    """Run (or resume) a sweep of ``rollouts`` simulations over the scenario's parameter space.

    Args:
        scenario: a loaded :class:`Scenario` or the path of its TOML file.
        rollouts: planned number of rollouts (the design size), at least 1.
        design: ``"sobol"`` | ``"lhs"`` | ``"random"`` (see :mod:`gapgauge.sim.design`).
        seed: non-negative integer; fixes the design and every physics draw.
        store: a :class:`~gapgauge.store.Store` or the path of its file (opened and closed here).
        workers: simulation threads (local) or MuJoCo threads per Dask task; default all local cores,
            1 per Dask task.
        dask: a Dask scheduler address (``"tcp://host:8786"``) or a ``distributed.Client``; None runs locally.
        nominal: use the nominal physics for every rollout instead of random draws.
        chunk_size: rollouts per chunk (one store transaction); default :data:`DEFAULT_CHUNK`.
        progress: show a progress bar (rate and time left) on stderr.

    Returns:
        A :class:`SweepSummary`; ``nothing_to_do`` is true when the run was already complete.
    """
    scenario = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    _check_arguments(rollouts, design, seed, workers, chunk_size)
    check_model(scenario)  # before the store is touched: a bad model leaves no run behind
    chunk = int(chunk_size or DEFAULT_CHUNK)
    db = store if isinstance(store, Store) else Store(store)
    try:
        run_id = db.start_run("sweep", scenario, seed=seed, design=design, planned=rollouts, nominal=nominal)
        todo = np.setdiff1d(np.arange(rollouts, dtype=np.int64), db.done_indices(run_id))
        start = time.perf_counter()
        ran = 0
        if todo.size:
            params = make_design(scenario, rollouts, design, seed)
            chunks = [todo[i:i + chunk] for i in range(0, todo.size, chunk)]

            def payload(indices: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
                return params[indices], draw_physics(scenario, seed, indices, nominal=nominal), indices

            def write(batch: RolloutBatch) -> int:
                db.write_rollouts(run_id, batch)
                return len(batch)

            client, own_client = _connect(dask) if dask is not None else (None, False)
            try:
                with _progress_bar(progress, scenario.name, rollouts, rollouts - todo.size) as advance:
                    if client is None:
                        ran = _run_local(scenario, chunks, payload, write, advance, workers)
                    else:
                        ran = _run_dask(client, scenario, chunks, payload, write, advance, workers)
            finally:
                if own_client:
                    client.close()
        wall = time.perf_counter() - start
        db.finish_run(run_id)
        return _summary(db, scenario, run_id, ran, wall, todo.size == 0)
    finally:
        if db is not store:
            db.close()


def check_model(scenario: Scenario) -> None:
    """Compile the scenario's MJCF once, so a model MuJoCo cannot use (not XML, an ``<include>`` that is
    missing, no ``ankle_servo``...) is one :class:`ScenarioError` line before any work, not a crash later.

    The scenario loader only looks for ``<mujoco`` near the file's start; compiling is MuJoCo's job.
    """
    from .model import model_layout

    model_layout(scenario)  # raises ScenarioError for a model MuJoCo cannot use


def _check_arguments(rollouts: Any, design: str, seed: Any, workers: Any, chunk_size: Any) -> None:
    def whole(value: Any) -> bool:
        return isinstance(value, (int, np.integer)) and not isinstance(value, bool)

    if not whole(rollouts) or not 1 <= rollouts <= MAX_ROLLOUTS:
        raise GapgaugeError(f"rollouts: must be a whole number from 1 to {MAX_ROLLOUTS:,}, got {rollouts!r}; "
                            "for more, run further sweeps with other seeds")
    if design not in DESIGNS:
        raise GapgaugeError(f"design: unknown design {design!r}; use one of {', '.join(DESIGNS)}")
    if not whole(seed) or not 0 <= seed <= MAX_SEED:
        raise GapgaugeError(f"seed: must be a whole number in 0..{MAX_SEED}, got {seed!r}; e.g. --seed 0")
    for name, value in (("workers", workers), ("chunk_size", chunk_size)):
        if value is not None and (not whole(value) or value < 1):
            raise GapgaugeError(f"{name}: must be a whole number of at least 1, got {value!r}; or leave it out")


def _simulate(scenario: Scenario, params: np.ndarray, physics: np.ndarray, indices: np.ndarray,
              nthread: int | None) -> RolloutBatch:
    from .rollout import simulate

    return simulate(scenario, params, physics, indices=indices, nthread=nthread)


def _run_local(
    scenario: Scenario, chunks: list[np.ndarray], payload: Callable, write: Callable[[RolloutBatch], int],
    advance: Callable[[int], None], workers: int | None,
) -> int:
    """Simulate the chunks through one pipeline (:func:`gapgauge.sim.rollout.simulate_chunks`: MuJoCo's
    threads step one sub-batch while this thread builds the next and measures the last), writing each
    chunk as soon as it is measured; the write, too, overlaps the stepping."""
    from .rollout import simulate_chunks

    nthread = workers or os.cpu_count() or 1
    ran = 0
    for batch in simulate_chunks(scenario, (payload(indices) for indices in chunks), nthread=nthread):
        done = write(batch)
        ran += done
        advance(done)
    return ran


def simulate_remote(scenario_path: str, scenario_hash: str, params: np.ndarray, physics: np.ndarray,
                    indices: np.ndarray, nthread: int) -> RolloutBatch:
    """The task a Dask worker runs: load the scenario from its path, check it is the same version as
    the client's (content hash), simulate one chunk. Arrays as in :func:`gapgauge.sim.rollout.simulate`."""
    scenario = load_scenario(scenario_path)
    if scenario.content_hash != scenario_hash:
        raise ScenarioError(
            f"{scenario_path}: the Dask worker's copy of the scenario (or its model) differs from the client's "
            f"(hash {scenario.content_hash} != {scenario_hash}); give the workers the same files"
        )
    return _simulate(scenario, params, physics, indices, nthread)


def _connect(dask: Any) -> tuple[Any, bool]:
    """A ``distributed.Client`` for ``dask`` (an address, or a client given by the caller) and whether
    this sweep opened it (and so closes it)."""
    try:
        from distributed import Client
    except ImportError:
        raise GapgaugeError(
            "--dask: Dask distributed is not installed; pip install 'gapgauge[cluster]' or leave out --dask"
        ) from None
    if isinstance(dask, Client):
        return dask, False
    try:
        return Client(dask, timeout="20s"), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise GapgaugeError(f"--dask {dask}: cannot reach the scheduler ({exc}); check the address") from None


def _run_dask(
    client: Any, scenario: Scenario, chunks: list[np.ndarray], payload: Callable,
    write: Callable[[RolloutBatch], int], advance: Callable[[int], None], workers: int | None,
) -> int:
    """Workers simulate chunks; results are written here as they arrive. At most two chunks per
    worker thread are in flight, so neither side's memory grows with the sweep."""
    from distributed import as_completed

    ran = 0
    futures = as_completed()
    threads = sum(client.nthreads().values()) or 1
    queue = iter(chunks)

    def submit(count: int) -> None:
        for indices in (next(queue, None) for _ in range(count)):
            if indices is None:
                return
            futures.add(client.submit(simulate_remote, str(scenario.path), scenario.content_hash,
                                      *payload(indices), workers or 1, pure=False))

    try:
        submit(2 * threads)
        for future in futures:
            batch = future.result()
            future.release()
            ran += write(batch)
            advance(len(batch))
            submit(1)
    except BaseException:
        for future in list(futures.futures):
            future.cancel()
        raise
    return ran


@contextmanager
def _progress_bar(show: bool, name: str, total: int, already: int) -> Iterator[Callable[[int], None]]:
    """A rich progress bar on stderr (count, rate, time left); yields ``advance(n)``."""
    if not show:
        yield lambda n: None
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        ProgressColumn,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )
    from rich.text import Text

    class RateColumn(ProgressColumn):
        def render(self, task) -> Text:
            speed = task.finished_speed or task.speed
            return Text("-- rollouts/s" if not speed else f"{speed:,.0f} rollouts/s")

    bar = Progress(TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(), RateColumn(),
                   TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
                   console=Console(stderr=True), transient=False)
    with bar:
        task = bar.add_task(f"sweep {name}", total=total, completed=already)
        yield lambda n: bar.advance(task, n)


def _summary(db: Store, scenario: Scenario, run_id: int, ran: int, wall: float, nothing: bool) -> SweepSummary:
    run = db.run(run_id)
    stats = db.run_summary(run_id)
    best = stats["best_params"]
    return SweepSummary(
        run_id=run_id, scenario=scenario.name, store=str(db.path), design=run.design, seed=run.seed,
        nominal=run.nominal, planned=run.planned, done=run.done, ran_now=ran, ok=stats["ok"], fell=stats["fell"],
        diverged=stats["diverged"], best_objective=stats["best_objective"],
        best_params={} if best is None else scenario.params_to_mapping(best),
        wall_seconds=wall, rollouts_per_second=ran / wall if wall > 0 and ran else 0.0, nothing_to_do=nothing,
        units={p.name: p.unit for p in scenario.parameters},
    )
