"""simulate(): batched ``mujoco.rollout``, divergence detection, trajectories, features, objective.

One MjModel per rollout carries its gains and physics (:mod:`gapgauge.sim.model`); the inputs are
open-loop arrays (:mod:`gapgauge.sim.controls`); ``mujoco.rollout`` steps them all in C threads, one
reused ``MjData`` per thread. Rollouts go through in sub-batches of at most :data:`SUB_BATCH`, with
every large array (controls, states, sensor data) allocated once per call and reused, so memory does
not grow with the number of rollouts unless the full trajectories are asked for.

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

import mujoco
import mujoco.rollout
import numpy as np

from ..features import compute_features, cop_from_foot_forces
from ..observe import logger_view
from ..records import RolloutBatch
from ..scenario import Scenario
from ..trajectory import Trajectory
from .controls import CONTROL_SPEC, STATE_SPEC, build_controls, control_size, initial_state, state_offsets
from .model import ModelLayout, _load, build_models

#: rollouts per ``mujoco.rollout`` call: about 130 MB of controls, states and sensor data at 1,500
#: steps, large enough that the per-call overhead is small against the stepping.
SUB_BATCH = 128


def _channels(sd: np.ndarray, lay: ModelLayout, with_cop: bool) -> dict[str, np.ndarray]:
    """Trajectory channels (SI), each ``(nbatch x nstep)``, from ``sd (nbatch x nstep x nsensordata)``."""

    def s(name: str, axis: int = 0) -> np.ndarray:
        return sd[:, :, lay.sensor[name][0] + axis]

    ch: dict[str, np.ndarray] = {}
    for joint in ("ankle", "knee", "hip"):
        ch[f"{joint}_angle"] = s(f"{joint}_angle").copy()
        ch[f"{joint}_rate"] = s(f"{joint}_rate").copy()
        ch[f"{joint}_torque"] = s(f"{joint}_torque").copy()
    ch["heel_force"] = s("heel_force").copy()
    ch["toe_force"] = s("toe_force").copy()
    ch["heel_x"] = s("heel_pos").copy()
    ch["toe_x"] = s("toe_pos").copy()
    ch["com_x"] = s("com_pos").copy()
    ch["com_z"] = s("com_pos", 2) - lay.support_z
    ch["com_vx"] = s("com_vel").copy()
    ch["com_vz"] = s("com_vel", 2).copy()
    # Trunk pitch from vertical: the hinge angles add up along the planar chain (DEVELOPERS.md).
    ch["trunk_pitch"] = s("root_pitch") + ch["ankle_angle"] + ch["knee_angle"] + ch["hip_angle"]
    ch["body_contact"] = s("thigh_contact") + s("trunk_contact")
    ch["platform_x"] = s("platform_x").copy()
    if with_cop:
        ch["cop_x"] = cop_from_foot_forces(ch["heel_force"], ch["toe_force"], ch["heel_x"], ch["toe_x"])
    return ch


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
    finite_state = np.isfinite(state).all(axis=2)
    finite_sensor = np.isfinite(sd).all(axis=2)
    qvel = np.abs(state[:, :, offsets["qvel"]:offsets["qvel"] + nv])
    limit = 1.0 / dt
    with np.errstate(invalid="ignore"):
        fast = (qvel > limit).any(axis=2)
    reasons = [""] * nbatch
    for i in np.flatnonzero(~finite_state.all(axis=1) | ~finite_sensor.all(axis=1) | fast.any(axis=1)
                            | ~(np.abs(time[:, -1] - t_end) < 0.5 * dt)):
        if not finite_state[i].all() or not finite_sensor[i].all():
            k = int(np.argmin(finite_state[i] & finite_sensor[i]))
            reasons[i] = f"non-finite state or sensor value at t = {k * dt:.3f} s"
        elif not abs(time[i, -1] - t_end) < 0.5 * dt:
            reached = float(np.nanmax(time[i]))
            reasons[i] = (f"MuJoCo stopped the rollout at t = {reached:.3f} s of {t_end:.3f} s "
                          "(a simulation warning, e.g. unstable acceleration)")
        else:
            k = int(np.argmax(fast[i]))
            reasons[i] = (f"|qvel| = {float(np.nanmax(qvel[i, k])):.3g} exceeds {limit:.3g} (one unit per "
                          f"time step) at t = {(k + 1) * dt:.3f} s")
    return reasons


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
    nthread = (os.cpu_count() or 1) if nthread is None else int(nthread)
    if nthread < 1 or sub_batch < 1:
        raise ValueError(f"nthread and sub_batch must be positive, got {nthread} and {sub_batch}")

    base, lay = _load(scenario.model_path)
    task = scenario.task
    nstep, dt = task.nstep, task.timestep
    names = scenario.features.names
    measured = [name for name in names if name != "fell"]
    features = {name: np.full(n, np.nan) for name in names}
    reason = [""] * n

    finite_in = np.isfinite(params).all(axis=1) & np.isfinite(physics).all(axis=1)
    for i in np.flatnonzero(~finite_in):
        bad = [p.name for p, v in zip(scenario.parameters, params[i], strict=True) if not np.isfinite(v)]
        bad += [r.name for r, v in zip(scenario.physics, physics[i], strict=True) if not np.isfinite(v)]
        reason[i] = f"not simulated: non-finite input {', '.join(bad)}"
    run = np.flatnonzero(finite_in)

    t = np.arange(nstep) * dt
    full: dict[str, np.ndarray] | None = None
    if return_trajectory:
        full = {}

    size = min(sub_batch, max(len(run), 1))
    nstate = mujoco.mj_stateSize(base, STATE_SPEC)
    control = np.empty((size, nstep, control_size(base)))
    state = np.empty((size, nstep, nstate))
    sensordata = np.empty((size, nstep, base.nsensordata))
    offsets = state_offsets(base)
    pool: list[mujoco.MjModel] = []
    datas = [mujoco.MjData(base) for _ in range(nthread)]
    with mujoco.rollout.Rollout(nthread=nthread if nthread > 1 else 0) as runner:
        for first in range(0, len(run), size):
            rows = run[first:first + size]
            m = len(rows)
            pool = build_models(scenario, params[rows], physics[rows], out=pool)
            ctrl = build_controls(scenario, params[rows], physics[rows], out=control)
            x0 = initial_state(scenario, params[rows])
            st, sd = state[:m], sensordata[:m]
            # Shapes and types are fixed above, once; skip_checks also avoids the wrapper's copy of
            # the control array (its singleton tiling copies even when nothing is tiled).
            runner.rollout(pool[:m], datas, x0, ctrl, control_spec=CONTROL_SPEC, skip_checks=True,
                           nstep=nstep, state=st, sensordata=sd)

            why = _divergence(st, sd, offsets, base.nv, dt)
            good = np.array([not w for w in why])
            for r, w in zip(rows, why, strict=True):
                reason[r] = w
            ch = _channels(sd, lay, with_cop=return_trajectory)
            if full is not None:
                for name, values in ch.items():
                    full.setdefault(name, np.full((n, nstep), np.nan))[rows] = values
            if good.any():
                traj = Trajectory(t, {c: v for c, v in ch.items() if c != "cop_x"}, onset=task.onset)
                if not good.all():
                    traj = traj.select(good)
                # Measured as a log is (same resampling and low-pass); the fall itself is judged on the
                # raw signals, which include body contact that no logger records.
                got = compute_features(logger_view(traj, scenario.hardware), scenario.features, measured)
                got["fell"] = compute_features(traj, scenario.features, ["fell"])["fell"]
                for name in names:
                    features[name][rows[good]] = got[name]

    diverged = np.array([bool(w) for w in reason], dtype=bool)
    with np.errstate(invalid="ignore"):
        fell = features["fell"] == 1.0
    status = np.where(diverged, "diverged", np.where(fell, "fell", "ok"))
    objective = np.asarray(scenario.objective.evaluate(features), dtype=float)
    objective[diverged] = np.nan
    for name in names:
        features[name][diverged] = np.nan
    batch = RolloutBatch(
        indices=indices.copy(),
        params=params,
        physics=physics,
        physics_names=tuple(r.name for r in scenario.physics),
        status=status,
        reason=np.array(reason, dtype=object),
        objective=objective,
        features=features,
    )
    if not return_trajectory:
        return batch
    if full is None or not full:
        empty = np.zeros((0, nstep, base.nsensordata))
        full = {c: np.full((n, nstep), np.nan) for c in _channels(empty, lay, True)}
    meta = {"source": "simulation", "scenario": scenario.name, "scenario_hash": scenario.content_hash,
            "indices": indices.tolist()}
    return batch, Trajectory(t, full, onset=task.onset, meta=meta)
