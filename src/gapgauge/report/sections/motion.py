"""Section 3, motion seen: each hardware trial's trajectories over the band of its matched simulations,
and a stick-figure filmstrip of the trial that differs most from its simulations.

Channels are taken as the trajectories carry them, never by a fixed list of joints: the centre of mass
(``com_x``, ``com_vx``; ``_y`` too on a 3-D body), the centre of pressure (``cop_x``, ``cop_y``, or from
the contact forces the way the features derive it), the trunk pitch and every ``<joint>_torque``. The
filmstrip poses the scenario's compiled model from every ``<joint>_angle`` channel, mapped onto the model's
joints by the scenario's ``[model.channels]`` names (:mod:`gapgauge.report.kinematics`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ...features import cop_from_foot_forces, hold_last_defined
from ...quantities import channel_unit, display_unit, format_quantity, label, with_unit
from ...scenario import compile_model
from ...trajectory import Trajectory
from .. import kinematics, motion_plots
from ..inputs import ReportInputs, TrialMotion
from .common import Figure

BODY_CHANNELS = ("com_x", "com_y", "com_vx", "com_vy", "cop_x", "cop_y", "trunk_pitch")  # y: a 3-D body
TORQUE_SUFFIX = "_torque"
ANGLE_SUFFIX = "_angle"
FILM_INSTANTS = (-0.1, None, 0.25, 0.5, 1.0, "end")  # s from onset; None: mid-disturbance; "end": the last sample


def disturbance_text(inputs: ReportInputs) -> str:
    task = inputs.scenario.task
    if task.kind == "push":
        return (f"push of {format_quantity(task.magnitude, 'N')} on the {task.body} for "
                f"{format_quantity(task.duration, 's')}")
    return f"platform moves {format_quantity(task.magnitude, 'm')} over {format_quantity(task.duration, 's')}"


def with_cop(traj: Trajectory | None) -> dict[str, np.ndarray]:
    """The trajectory's channels plus ``cop_x`` (and ``cop_y`` on a 3-D body) derived from two contact
    groups' forces and positions (:func:`gapgauge.features.cop_from_foot_forces`, unloaded samples held)
    when not logged."""
    if traj is None:
        return {}
    channels = dict(traj.channels)
    stems = [n[: -len("_force")] for n in channels if n.endswith("_force")]
    for axis in ("x", "y"):
        groups = [g for g in stems if f"{g}_{axis}" in channels]
        if f"cop_{axis}" not in channels and len(groups) == 2:
            a, b = groups
            cop = cop_from_foot_forces(channels[f"{a}_force"], channels[f"{b}_force"], channels[f"{a}_{axis}"],
                                       channels[f"{b}_{axis}"])
            channels[f"cop_{axis}"] = hold_last_defined(cop)
    return channels


def plotted_channels(*sources: dict[str, np.ndarray]) -> list[str]:
    """The channels drawn: the body channels present, then every joint torque, in the sources' order."""
    present = list(dict.fromkeys(name for source in sources for name in source))
    body = [c for c in BODY_CHANNELS if c in present]
    return body + [c for c in present if c.endswith(TORQUE_SUFFIX)]


def _panels(names: list[str], hardware: dict[str, np.ndarray], simulated: dict[str, np.ndarray]):
    panels = []
    for name in names:
        unit = channel_unit(name)
        hw = hardware.get(name)
        sim = simulated.get(name)
        values = np.concatenate([np.ravel(v) for v in (hw, sim) if v is not None])
        shown = display_unit(unit, values[np.isfinite(values)], degrees=True)
        scale = 1.0 / shown.factor
        panels.append(motion_plots.Panel(
            with_unit(label(name), shown),
            None if hw is None else scale * np.asarray(hw, float)[0],
            None if sim is None else scale * np.asarray(sim, float),
        ))
    return panels


def _relative_time(traj: Trajectory | None) -> np.ndarray | None:
    return None if traj is None else traj.t - traj.onset


def _score_from_trajectories(m: TrialMotion) -> float:
    """RMS over the drawn channels and the time after onset of (hardware - simulated median) / the
    simulations' spread (half the 5-95% band, floored at a tenth of the channel's range)."""
    if m.hardware is None or m.simulated is None:
        return float("nan")
    hw, sim = with_cop(m.hardware), with_cop(m.simulated)
    t_sim = m.simulated.t
    after = t_sim >= m.simulated.onset
    scores = []
    for name in plotted_channels(hw, sim):
        if name not in hw or name not in sim:
            continue
        median, low, high = motion_plots.band(sim[name][:, after])
        span = np.nanmax(median) - np.nanmin(median) if np.isfinite(median).any() else 0.0
        spread = np.maximum(0.5 * (high - low), 0.1 * span + 1e-12)
        on_sim = np.interp(t_sim[after], m.hardware.t, hw[name][0])
        z = (on_sim - median) / spread
        if np.isfinite(z).any():
            scores.append(float(np.sqrt(np.nanmean(z**2))))
    return float(np.mean(scores)) if scores else float("nan")


def most_different(inputs: ReportInputs, motions: list[TrialMotion]) -> tuple[TrialMotion | None, str]:
    """The trial that differs most from its simulations, and by what measure.

    By the shift assessment when there is one (the largest root-mean-square standardised residual over
    the features, the figures of the shift table), else by the trajectories themselves.
    """
    candidates = [m for m in motions if m.hardware is not None and m.simulated is not None]
    if not candidates:
        return None, ""
    shift = inputs.shift
    ids = {t.id: n for n, t in enumerate(inputs.trials, start=1)}
    if shift is not None and shift.features:
        residuals = np.array([f.residuals for f in shift.features], float).T  # (trials x features)
        by_number = {}
        for row, trial_id in enumerate(shift.trial_ids):
            finite = residuals[row][np.isfinite(residuals[row])]
            if trial_id in ids and finite.size:
                by_number[ids[trial_id]] = float(np.sqrt(np.mean(finite**2)))
        ranked = [m for m in candidates if m.number in by_number]
        if ranked:
            pick = max(ranked, key=lambda m: by_number[m.number])
            return pick, (f"the largest root-mean-square standardised residual over the features in the shift "
                          f"table ({by_number[pick.number]:.2f} simulated sd)")
    scores = {m.number: _score_from_trajectories(m) for m in candidates}
    finite = [m for m in candidates if np.isfinite(scores[m.number])]
    if not finite:
        return candidates[0], "the first trial with both series (no difference could be measured)"
    pick = max(finite, key=lambda m: scores[m.number])
    return pick, "the largest distance of its trajectories from the simulations' median, in simulated spreads"


def model_joints(scenario) -> dict[str, str]:
    """Trade name -> model joint name, from the scenario's ``[model.channels]`` map (empty without one:
    channels then name the model's joints themselves)."""
    body = getattr(scenario, "body", None)
    return {j.name: j.joint for j in getattr(body, "joints", ())}


def _instants(inputs: ReportInputs, m: TrialMotion) -> list[float]:
    task = inputs.scenario.task
    last = float(min(m.hardware.t[-1] - m.hardware.onset, m.simulated.t[-1] - m.simulated.onset))
    first = float(max(m.hardware.t[0] - m.hardware.onset, m.simulated.t[0] - m.simulated.onset))
    out = []
    for when in FILM_INSTANTS:
        value = 0.5 * task.duration if when is None else last if when == "end" else float(when)
        if first <= value <= last and all(abs(value - o) > 0.05 for o in out):
            out.append(value)
    return out


def _angles_at(traj: Trajectory, instants: list[float], median: bool) -> dict[str, np.ndarray]:
    times = np.asarray(instants) + traj.onset
    out = {}
    for name, values in traj.channels.items():
        if not name.endswith(ANGLE_SUFFIX):
            continue
        rows = np.array([np.interp(times, traj.t, row) for row in values])
        out[name] = np.nanmedian(rows, axis=0) if median else rows[0]
    return out


def filmstrip(inputs: ReportInputs, m: TrialMotion, why: str) -> Figure | None:
    """The stick-figure filmstrip of trial ``m``: hardware above the median of its matched simulations."""
    if m.hardware is None or m.simulated is None:
        return None
    scenario = inputs.scenario
    task = scenario.task
    model = compile_model(scenario.model_path, scenario.path)
    instants = _instants(inputs, m)
    if not instants:
        return None
    mark = task.body if task.kind == "push" else None
    joints = model_joints(scenario)
    if not kinematics.joint_map(model, m.hardware.channels, joints):
        return None
    hardware = kinematics.poses(model, _angles_at(m.hardware, instants, median=False), mark, joints)
    simulated = kinematics.poses(model, _angles_at(m.simulated, instants, median=True), mark, joints)
    pushing = [task.kind == "push" and 0.0 <= t <= task.duration for t in instants]
    direction = getattr(task, "direction", None)  # a 3-D push: its forward (x) component sets the arrow
    forward = (1.0 if direction is None else float(np.ravel(direction)[0])) * task.magnitude
    png = motion_plots.filmstrip(hardware, simulated, instants, pushing,
                                 f"trial {m.number}: hardware (top) and its matched simulations' median (bottom)",
                                 push_direction=1.0 if forward >= 0 else -1.0)
    return Figure(
        "motion_filmstrip",
        png,
        f"stick-figure filmstrip of trial {m.number}",
        f"Trial {m.number}, the one that differs most from its simulations ({why}): the model's segments "
        "posed by the logged joint angles (top) and by the median joint angles of its matched simulations "
        "(bottom) at the instants shown (s from the disturbance onset), each over a faint copy of the other; "
        "X: centre of mass; arrow: the push while it acts. Drawn from the compiled MuJoCo model's own "
        "kinematics; joints without a logged angle (the foot's root) stay at the model's reference pose.",
    )


def motion_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """Per trial its trajectory figure, and the filmstrip of the most different trial; None without trials."""
    motions = [m for m in inputs.motion if m.hardware is not None or m.simulated is not None]
    if not motions:
        return None
    disturbance = (0.0, inputs.scenario.task.duration)
    text = disturbance_text(inputs)
    trials = []
    for m in motions:
        hw, sim = with_cop(m.hardware), with_cop(m.simulated)
        k = 0 if m.simulated is None else m.simulated.nbatch
        png = motion_plots.trajectories(
            _relative_time(m.hardware), _relative_time(m.simulated), _panels(plotted_channels(sim, hw), hw, sim),
            disturbance, text, f"trial {m.number}: hardware against {k} matched simulations",
        )
        trials.append({
            "number": m.number,
            "note": m.note,
            "figure": Figure(
                f"motion_trial_{m.number}", png, f"trajectories of trial {m.number}",
                f"Trial {m.number} over time (s from the disturbance onset): the hardware series (black) over "
                f"the median (blue) and 5-95% band of {k} of its matched simulations, re-simulated at its "
                "parameters with the match runs' physics draws and seen through the same logger model.",
            ),
        })
    pick, why = most_different(inputs, motions)
    film = None if pick is None else filmstrip(inputs, pick, why)
    figures = [t["figure"] for t in trials] + ([film] if film is not None else [])
    return {"trials": trials, "filmstrip": film, "most_different": None if pick is None else pick.number,
            "why": why, "disturbance": text, "figures": figures}
