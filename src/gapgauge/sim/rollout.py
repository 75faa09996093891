"""simulate(): batched ``mujoco.rollout``, divergence detection, trajectories, features, objective.

One MjModel per rollout carries its gains and physics (:mod:`gapgauge.sim.model`); the inputs are
open-loop arrays (:mod:`gapgauge.sim.controls`); ``mujoco.rollout`` steps them all in C threads, one
reused ``MjData`` per thread. Rollouts go through in sub-batches of at most :data:`SUB_BATCH`, with
every large array (controls, states, sensor data) allocated once per call in two slots and reused, so
memory does not grow with the number of rollouts unless the full trajectories are asked for. While
MuJoCo steps one sub-batch (it releases the GIL), the calling thread measures the one before and
builds the one after (:func:`_pipeline`), so the Python work does not leave a core idle; the sweep
streams its chunks through one such pipeline (:func:`simulate_chunks`).

Trajectory time base: ``mujoco.rollout`` records ``sensordata`` as computed inside step ``k``, i.e. at
the state before that step's integration, time ``t_k = k dt``; so sample 0 is the initial state.

A rollout is ``diverged`` (never an exception; the other rollouts are unaffected) when

- an input (parameter or physics value) is not finite: it is not simulated;
- MuJoCo stopped it early: on a simulation warning (for example an unstable acceleration,
  ``mjWARN_BADQACC``) the rollout stops stepping and repeats its last state, so its clock ends short;
- its state or sensor data hold NaN or infinity;
- some ``|qvel|`` exceeds one unit per time step (``1 / dt`` rad/s or m/s): a joint that turns a radian
  in one step is no longer resolved by the integrator; a body of this size falling from standing
  reaches about 5 m/s and some tens of rad/s, far below it.

Otherwise the status is ``fell`` if the ``fell`` feature says so, else ``ok``.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import mujoco
import mujoco.rollout
import numpy as np

from ..features import channels_needed, compute_features
from ..observe import logger_view
from ..records import RolloutBatch
from ..scenario import Scenario
from ..trajectory import Trajectory
from .channels import extract
from .controller import closed_loop
from .controls import CONTROL_SPEC, STATE_SPEC, build_controls, control_size, initial_state, state_offsets
from .model import _load, build_models

#: rollouts per ``mujoco.rollout`` call: about 130 MB of controls, states and sensor data at 1,500
#: steps, large enough that the per-call overhead is small against the stepping. Two sub-batches are in
#: flight at a time (see :func:`simulate_chunks`), so the buffers take twice that.
SUB_BATCH = 128

def _divergence(state: np.ndarray, sd: np.ndarray, offsets: dict[str, int], nv: int, dt: float) -> list[str]:
    """Reason each rollout of a sub-batch diverged ("" if it did not); see the module docstring.

    Args:
        state: full-physics states, ``(nbatch x nstep x nstate)``, column 0 time in s.
        sd: sensor data, ``(nbatch x nstep x nsensordata)``.
        offsets: start of time and qvel in a state vector.
        nv: number of dofs. dt: time step, s.
    """
    nbatch, nstep = state.shape[:2]
    t_end = nstep * dt
    time = state[:, :, offsets["time"]]
    qvel = state[:, :, offsets["qvel"]:offsets["qvel"] + nv]
    limit = 1.0 / dt
    # Whole-row screens first (reductions, no per-sample arrays); the sample where a rollout went wrong
    # is looked for only in the rows they flag. A row holding NaN is flagged by the finiteness screen,
    # whatever its NaN does to the speed screen's maximum.
    finite = np.isfinite(state.reshape(nbatch, -1)).all(axis=1) & np.isfinite(sd.reshape(nbatch, -1)).all(axis=1)
    with np.errstate(invalid="ignore"):
        fast = np.maximum(qvel.max(axis=(1, 2)), -qvel.min(axis=(1, 2))) > limit
    reasons = [""] * nbatch
    for i in np.flatnonzero(~finite | fast | ~(np.abs(time[:, -1] - t_end) < 0.5 * dt)):
        finite_i = np.isfinite(state[i]).all(axis=1) & np.isfinite(sd[i]).all(axis=1)
        if not finite_i.all():
            k = int(np.argmin(finite_i))
            reasons[i] = f"non-finite state or sensor value at t = {k * dt:.3f} s"
        elif not abs(time[i, -1] - t_end) < 0.5 * dt:
            reached = float(np.nanmax(time[i]))
            reasons[i] = (f"MuJoCo stopped the rollout at t = {reached:.3f} s of {t_end:.3f} s "
                          "(a simulation warning, e.g. unstable acceleration)")
        else:
            speed = np.abs(qvel[i])
            with np.errstate(invalid="ignore"):
                k = int(np.argmax((speed > limit).any(axis=1)))
            reasons[i] = (f"|qvel| = {float(np.nanmax(speed[k])):.3g} exceeds {limit:.3g} (one unit per "
                          f"time step) at t = {(k + 1) * dt:.3f} s")
    return reasons


@dataclass
class _Job:
    """One batch of rollouts in the pipeline; its results fill in as its sub-batches are measured."""

    params: np.ndarray  # (n x dim)
    physics: np.ndarray  # (n x k)
    indices: np.ndarray  # (n,)
    run: np.ndarray  # rows with finite inputs, the ones simulated
    features: dict[str, np.ndarray]  # name -> (n,)
    reason: list[str]
    full: dict[str, np.ndarray] | None  # channel -> (n x nstep) when the trajectories are kept
    pending: int  # sub-batches not measured yet


@dataclass
class _Slot:
    """Buffers of one sub-batch in flight: its models, controls and initial states, and MuJoCo's output."""

    models: list[mujoco.MjModel] = field(default_factory=list)
    control: np.ndarray | None = None  # (m x nstep x ncontrol)
    state: np.ndarray | None = None  # (m x nstep x nstate)
    sensordata: np.ndarray | None = None  # (m x nstep x nsensordata)
    x0: np.ndarray | None = None  # (m x nstate)


def _job(scenario: Scenario, params: np.ndarray, physics: np.ndarray | None, indices: np.ndarray | None,
         keep: bool, sub_batch: int) -> _Job:
    """Check one batch's arrays (shapes as in :func:`simulate`) and set up its results."""
    params = np.array(params, dtype=float, ndmin=2)
    n = params.shape[0]
    if params.ndim != 2 or params.shape[1] != scenario.dim:
        raise ValueError(f"params must be (n x {scenario.dim}) for {scenario.name!r}, got {params.shape}")
    k = len(scenario.physics)
    if physics is None:
        physics = np.tile([r.nominal for r in scenario.physics], (n, 1)).astype(float)
    physics = np.array(physics, dtype=float, ndmin=2)
    if physics.shape != (n, k):
        raise ValueError(f"physics must be ({n} x {k}) to match params, got {physics.shape}")
    indices = np.arange(n) if indices is None else np.asarray(indices).reshape(-1)
    if indices.shape != (n,):
        raise ValueError(f"indices must be ({n},) to match params, got {indices.shape}")
    reason = [""] * n
    finite_in = np.isfinite(params).all(axis=1) & np.isfinite(physics).all(axis=1)
    for i in np.flatnonzero(~finite_in):
        bad = [p.name for p, v in zip(scenario.parameters, params[i], strict=True) if not np.isfinite(v)]
        bad += [r.name for r, v in zip(scenario.physics, physics[i], strict=True) if not np.isfinite(v)]
        reason[i] = f"not simulated: non-finite input {', '.join(bad)}"
    run = np.flatnonzero(finite_in)
    return _Job(params, physics, indices, run, {name: np.full(n, np.nan) for name in scenario.features.names},
                reason, {} if keep else None, -(-len(run) // sub_batch))


def _pipeline(scenario: Scenario, jobs: Iterable[_Job], nthread: int, sub_batch: int) -> Iterator[_Job]:
    """Simulate and measure ``jobs`` in sub-batches of at most ``sub_batch``; yield each job, in order,
    once all its sub-batches are measured.

    Three stages overlap: while ``mujoco.rollout`` steps sub-batch ``k`` in its C threads (it releases the
    GIL), this thread measures sub-batch ``k - 1`` (divergence, channels, logger view, features), hands
    finished jobs to the caller, and builds sub-batch ``k + 1`` (models, controls, initial states). Two
    slots of buffers alternate: ``k + 1`` is built in the slot ``k - 1`` has just been measured from.
    Results do not depend on the overlap: each stage of a sub-batch runs in the same order on the same
    data as it would alone.
    """
    base, lay = _load(scenario)
    # the one dispatch point of the controller: None steps the built-in (open-loop) controller
    loop = closed_loop(scenario, base, lay)  # loads a callable's module (runs its code); None for the built-in
    task = scenario.task
    nstep, dt = task.nstep, task.timestep
    names = scenario.features.names
    measured = [name for name in names if name != "fell"]
    logged = channels_needed(measured, scenario.features)  # what the measured features read, low-passed as a log is
    raw = channels_needed(["fell"], scenario.features)  # what the fall test reads, unfiltered
    wanted = set(logged) | set(raw)
    t = np.arange(nstep) * dt
    ncontrol = control_size(base)
    nstate = mujoco.mj_stateSize(base, STATE_SPEC)
    offsets = state_offsets(base)
    datas = [mujoco.MjData(base) for _ in range(nthread)]
    order: deque[_Job] = deque()

    def sub_batches() -> Iterator[tuple[_Job, np.ndarray]]:
        for job in jobs:
            order.append(job)
            for first in range(0, len(job.run), sub_batch):
                yield job, job.run[first:first + sub_batch]

    source = sub_batches()

    def build(slot: _Slot) -> tuple[_Job, np.ndarray, _Slot] | None:
        got = next(source, None)
        if got is None:
            return None
        job, rows = got
        m = len(rows)
        if slot.control is None or slot.control.shape[0] < m:
            slot.control = np.empty((m, nstep, ncontrol))
            slot.state = np.empty((m, nstep, nstate))
            slot.sensordata = np.empty((m, nstep, base.nsensordata))
        slot.models = build_models(scenario, job.params[rows], job.physics[rows], out=slot.models)
        build_controls(scenario, job.params[rows], job.physics[rows], out=slot.control)
        slot.x0 = initial_state(scenario, job.params[rows])
        return job, rows, slot

    def step(runner: mujoco.rollout.Rollout, work: tuple[_Job, np.ndarray, _Slot]) -> None:
        job, rows, slot = work
        m = len(rows)
        if loop is None:
            # Shapes and types are fixed above, once; skip_checks also avoids the wrapper's copy of
            # the control array (its singleton tiling copies even when nothing is tiled).
            runner.rollout(slot.models[:m], datas, slot.x0, slot.control[:m], control_spec=CONTROL_SPEC,
                           skip_checks=True, nstep=nstep, state=slot.state[:m], sensordata=slot.sensordata[:m])
        else:  # a controller of one's own, called every control period (gapgauge.sim.controller)
            loop.rollout(runner, slot.models[:m], datas, slot.x0, slot.control[:m], job.params[rows],
                         state=slot.state[:m], sensordata=slot.sensordata[:m])

    def measure(work: tuple[_Job, np.ndarray, _Slot]) -> None:
        job, rows, slot = work
        m = len(rows)
        st, sd = slot.state[:m], slot.sensordata[:m]
        why = _divergence(st, sd, offsets, base.nv, dt)
        good = np.array([not w for w in why])
        for r, w in zip(rows, why, strict=True):
            job.reason[r] = w
        keep = job.full is not None
        # Views suffice when nothing is kept: everything read from them is done before this slot's
        # sensor data is overwritten (the sub-batch built into it next is stepped after this returns).
        ch = extract(sd, lay, names=None if keep else wanted, with_cop=keep, copy=keep)
        if keep:
            for name, values in ch.items():
                job.full.setdefault(name, np.full((len(job.reason), nstep), np.nan))[rows] = values
        if good.any():
            # Measured as a log is (same resampling and low-pass); the fall itself is judged on the
            # raw signals, which include body contact that no logger records.
            view = Trajectory(t, {c: ch[c] for c in logged}, onset=task.onset)
            fall = Trajectory(t, {c: ch[c] for c in raw}, onset=task.onset)
            if not good.all():
                view, fall = view.select(good), fall.select(good)
            got = compute_features(logger_view(view, scenario.hardware), scenario.features, measured) if measured \
                else {}
            got["fell"] = compute_features(fall, scenario.features, ["fell"])["fell"]
            for name in names:
                job.features[name][rows[good]] = got[name]
        job.pending -= 1

    def finished() -> Iterator[_Job]:
        while order and order[0].pending == 0:
            yield order.popleft()

    slots = (_Slot(), _Slot())
    with mujoco.rollout.Rollout(nthread=nthread if nthread > 1 else 0) as runner, \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="gapgauge-rollout") as stepper:
        current = build(slots[0])
        previous = None
        k = 0
        while current is not None:
            stepping = stepper.submit(step, runner, current)
            if previous is not None:
                measure(previous)
            yield from finished()
            following = build(slots[(k + 1) % 2])  # the slot `previous` was measured from
            stepping.result()
            previous, current = current, following
            k += 1
        if previous is not None:
            measure(previous)
        yield from finished()


def _result(scenario: Scenario, job: _Job, keep: bool) -> RolloutBatch | tuple[RolloutBatch, Trajectory]:
    """A finished job as :func:`simulate` returns it."""
    names = scenario.features.names
    features, reason = job.features, job.reason
    diverged = np.array([bool(w) for w in reason], dtype=bool)
    with np.errstate(invalid="ignore"):
        fell = features["fell"] == 1.0
    status = np.where(diverged, "diverged", np.where(fell, "fell", "ok"))
    objective = np.asarray(scenario.objective.evaluate(features), dtype=float)
    objective[diverged] = np.nan
    for name in names:
        features[name][diverged] = np.nan
    batch = RolloutBatch(
        indices=job.indices.copy(),
        params=job.params,
        physics=job.physics,
        physics_names=tuple(r.name for r in scenario.physics),
        status=status,
        reason=np.array(reason, dtype=object),
        objective=objective,
        features=features,
    )
    if not keep:
        return batch
    task = scenario.task
    nstep = task.nstep
    n = len(reason)
    full = job.full
    if not full:
        base, lay = _load(scenario)
        empty = np.zeros((0, nstep, base.nsensordata))
        full = {c: np.full((n, nstep), np.nan) for c in extract(empty, lay, with_cop=True)}
    meta = {"source": "simulation", "scenario": scenario.name, "scenario_hash": scenario.content_hash,
            "simulation_hash": scenario.simulation_hash,
            "indices": job.indices.tolist()}
    return batch, Trajectory(np.arange(nstep) * task.timestep, full, onset=task.onset, meta=meta)


def _threads(nthread: int | None, sub_batch: int) -> int:
    nthread = (os.cpu_count() or 1) if nthread is None else int(nthread)
    if nthread < 1 or sub_batch < 1:
        raise ValueError(f"nthread and sub_batch must be positive, got {nthread} and {sub_batch}")
    return nthread


def simulate(
    scenario: Scenario,
    params: np.ndarray,
    physics: np.ndarray | None = None,
    *,
    indices: np.ndarray | None = None,
    nthread: int | None = None,
    return_trajectory: bool = False,
    sub_batch: int = SUB_BATCH,
) -> RolloutBatch | tuple[RolloutBatch, Trajectory]:
    """Simulate a batch of rollouts of ``scenario`` and measure them.

    Args:
        scenario: the scenario (model, task, features, objective).
        params: policy parameters, ``(n x dim)`` in scenario units and column order (a ``(dim,)``
            vector is one rollout).
        physics: physics draw, ``(n x k)`` in scenario ``[physics]`` order (see
            :func:`gapgauge.sim.physics.draw_physics`); None means the nominal values for every rollout.
        indices: rollout indices within the run, ``(n,)`` int, recorded in the result; default ``0..n-1``.
        nthread: threads for ``mujoco.rollout``; default ``os.cpu_count()``.
        return_trajectory: also return every rollout's trajectory (``n x nstep`` per channel: about
            0.25 MB per rollout at 1,500 steps, so ask only for small batches).
        sub_batch: rollouts per ``mujoco.rollout`` call (memory, not results, depends on it).

    Returns:
        A :class:`~gapgauge.records.RolloutBatch` (status ``ok | fell | diverged``, reason, objective
        and features; NaN objective and features where diverged), and with ``return_trajectory`` also
        the :class:`~gapgauge.trajectory.Trajectory` (``t (nstep,)`` s, onset = task onset; rows of
        diverged rollouts hold whatever MuJoCo produced, NaN for rollouts not simulated).

    Raises:
        ValueError: an array of the wrong shape (a programming error, not a rollout's fate).
    """
    nthread = _threads(nthread, sub_batch)
    job = _job(scenario, params, physics, indices, return_trajectory, sub_batch)
    (done,) = _pipeline(scenario, [job], nthread, sub_batch)
    return _result(scenario, done, return_trajectory)


def simulate_chunks(
    scenario: Scenario,
    chunks: Iterable[tuple[np.ndarray, np.ndarray, np.ndarray]],
    *,
    nthread: int | None = None,
    sub_batch: int = SUB_BATCH,
) -> Iterator[RolloutBatch]:
    """:func:`simulate` over a stream of chunks, one pipeline for them all; yields each chunk's
    :class:`~gapgauge.records.RolloutBatch` in order as soon as it is measured.

    Each chunk is ``(params (n x dim), physics (n x k), indices (n,))`` as in :func:`simulate`, drawn
    from ``chunks`` only when the pipeline needs it. Results are those of :func:`simulate` on each
    chunk alone; the one difference is speed: the overlap of building, stepping and measuring
    (see :func:`_pipeline`) runs on across chunk edges, and the caller's work on a yielded chunk (a
    store write, say) overlaps the stepping of the next. Stopping the iteration early waits for the
    ``mujoco.rollout`` call in flight (at most one sub-batch).
    """
    nthread = _threads(nthread, sub_batch)
    jobs = (_job(scenario, p, ph, ix, False, sub_batch) for p, ph, ix in chunks)
    for done in _pipeline(scenario, jobs, nthread, sub_batch):
        yield _result(scenario, done, False)
