"""What every hardware log reader shares: the trial record, the raw stream, and :func:`build_trial`.

A reader (:mod:`.csv`, :mod:`.bag`) turns its file into :class:`Stream` objects in SI, relative to the log's
first sample, and hands them with the :class:`~.sidecar.Sidecar` to :func:`build_trial`, which checks the
samples (:mod:`.checks`: impossible values refuse the file, unusual ones flag a channel), places the trial
on the scenario's clock (:mod:`.align`), resamples every channel onto ``k / sample_rate_hz`` over the
logged span within the simulated one, and low-passes it when ``[hardware].lowpass_hz`` is set.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import LogError
from ..observe import lowpass
from ..scenario import Scenario
from ..trajectory import Trajectory
from ..units import UNITS
from .align import Alignment, align, estimate_onset, not_found, onset_from_trigger
from .checks import (
    ChannelFlag,
    body_mass,
    check_finite,
    check_joint_limit,
    check_time,
    joint_limits,
    platform_servo,
    unusual,
)
from .checks import plausible_limits as plausible_limits
from .sidecar import Sidecar


@dataclass
class LogTrial:
    """One hardware trial as read from its log and sidecar, validated, placed in time and in SI.

    Attributes:
        path: the log (CSV file, bag folder or bag file).
        sidecar_path: the sidecar JSON beside it.
        sha256: hex digest identifying the trial: the log's content followed by the sidecar's bytes.
        trajectory: batch of one on the common time base ``t (nstep,) s`` (``k / sample_rate_hz`` on the
            scenario's clock, within the simulated span), every mapped channel ``(1 x nstep)`` in SI,
            ``onset`` = ``scenario.task.onset``.
        params: policy parameters by name, in scenario units (inside the scenario's bounds).
        robot_id, recorded_at, outcome, notes, synthetic: the sidecar's fields (outcome ``"stood"``,
            ``"fell"`` or None when the operator gave none).
        ignored_columns: CSV columns (or bag topics) the scenario does not map, left unread.
        warnings: things worth a look that did not stop the trial (e.g. parameters outside the safe bounds).
        logged_rate_hz: median sampling rate of the raw log, Hz.
        nsamples: raw samples read (rows of the CSV).
        flags: unusual values, per channel (:class:`~.checks.ChannelFlag`); they never refuse a trial.
        alignment: how the trial was put on the scenario's clock (:class:`~.align.Alignment`).
        units: channel -> the unit the log declared; table: where they are declared (for messages).
    """

    path: Path
    sidecar_path: Path
    sha256: str
    trajectory: Trajectory
    params: dict[str, float]
    robot_id: str
    recorded_at: str
    outcome: str | None
    notes: str
    synthetic: bool
    ignored_columns: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    logged_rate_hz: float = float("nan")
    nsamples: int = 0
    flags: list[ChannelFlag] = field(default_factory=list)
    alignment: Alignment | None = None
    units: dict[str, str] = field(default_factory=dict)
    table: str = "[hardware.columns]"


@dataclass
class Stream:
    """Samples of some channels on one raw time base, already in SI (one CSV, or one bag topic).

    Attributes:
        t: ``(n,)`` s, relative to the log's first sample (validated by :func:`build_trial`).
        values: channel -> ``(n,)`` SI.
        units: channel -> the unit the log declared (for the unit hints).
        labels: channel -> the column or field it came from (for messages).
        locate: sample index -> location text, e.g. ``"trial.csv:17"``.
        locate_cell: (sample index, channel) -> location text with the column, e.g. ``"trial.csv:17:4"``.
        table: the scenario table that maps these channels, for messages.
        time_hint: added to a refusal of the time base (e.g. how to use the bag's record time).
    """

    t: np.ndarray
    values: dict[str, np.ndarray]
    units: dict[str, str]
    labels: dict[str, str]
    locate: Callable[[int], str]
    locate_cell: Callable[[int, str], str]
    table: str = "[hardware.columns]"
    time_hint: str = ""


@dataclass
class TriggerSamples:
    """The sidecar's trigger as read from the log: ``t (n,) s`` relative to the log's first sample, its values
    ``(n,)`` (None for a topic given without a field: its messages mark the onset) and a label."""

    t: np.ndarray
    values: np.ndarray | None
    label: str


def build_trial(
    scenario: Scenario,
    path: Path,
    streams: list[Stream],
    sidecar: Sidecar,
    sha256: str,
    ignored: list[str],
    *,
    origin: float = 0.0,
    trigger: TriggerSamples | None = None,
    log_clock_is_scenario: bool = True,
) -> LogTrial:
    """Check raw streams, place them on the scenario's clock, resample them onto one time base and filter.

    Each stream's ``t (n,) s`` must be finite, strictly increasing, without gaps over ``max_gap_s`` and not
    slower than ``min_rate_hz``; angles must lie within the joints' ranges (plus slack). Unusual values
    become flags. The trial is placed in time (:func:`gapgauge.logs.align.align`; ``origin`` is the
    log-clock time of ``t = 0``, ``log_clock_is_scenario`` says the log's clock is the scenario's by
    contract, as a CSV's) and, once placed, must span the disturbance. The common base is
    ``t_k = k / sample_rate_hz`` over the span all streams cover, cut to the simulated span
    ``[0, (nstep - 1) timestep]``; each channel is linearly interpolated onto it (``numpy.interp``) and then,
    if ``lowpass_hz`` is set, filtered with a Butterworth low-pass run forwards and backwards
    (``scipy.signal.sosfiltfilt``: zero phase).
    """
    hw, task = scenario.hardware, scenario.task
    limits = joint_limits(scenario)
    plausible = plausible_limits(scenario, [ch for s in streams for ch in s.values])
    rates, flags = [], []
    for stream in streams:
        check_time(scenario, stream)
        for channel, values in stream.values.items():
            check_finite(stream, channel, values)
            if channel in limits:
                check_joint_limit(stream, channel, values, limits[channel])
            flags.extend(unusual(stream, channel, values, plausible.get(channel)))
        rates.append(1.0 / float(np.median(np.diff(stream.t))))
    start = max(float(s.t[0]) for s in streams)
    end = min(float(s.t[-1]) for s in streams)
    rate = hw.sample_rate_hz
    if end - start < 2.0 / rate:
        raise LogError(f"{path}: the channels share less than two samples of time; log them over the same span"
                       + _time_unit_hint(streams[0], (start, end), task.onset, task.onset + task.duration))

    raw_grid = start + np.arange(int(math.floor((end - start) * rate)) + 1) / rate
    raw = {ch: np.interp(raw_grid, s.t, v) for s in streams for ch, v in s.values.items()}
    estimate = (estimate_onset(raw_grid, raw, task, body_mass(scenario), platform_servo(scenario))
                if raw_grid.size > 2 else not_found("too few samples"))
    stated = None
    if sidecar.disturbance_at is not None:
        stated = ("disturbance_at", sidecar.disturbance_at - origin)
    elif sidecar.trial_start_at is not None:
        stated = ("trial_start_at", sidecar.trial_start_at - origin + task.onset)
    found = None if trigger is None else onset_from_trigger(trigger.t, trigger.values, trigger.label)
    alignment = align(stated=stated, trigger=found, estimate=estimate, log_clock_is_scenario=log_clock_is_scenario,
                      task_onset=task.onset, tolerance=hw.onset_tolerance_s, period=1.0 / rate, origin=origin)
    shift = alignment.shift_s - origin  # relative to the streams' t
    span = (start - shift, end - shift)
    if alignment.placed and (span[0] > task.onset or span[1] < task.onset + task.duration):
        raise LogError(
            f"{path}: the log spans {span[0]:.6g} s to {span[1]:.6g} s of the scenario's clock but must cover "
            f"the disturbance ({task.onset:g} s to {task.onset + task.duration:g} s); {alignment.detail}"
            + _time_unit_hint(streams[0], span, task.onset, task.onset + task.duration)
        )
    sim_end = (task.nstep - 1) * task.timestep
    k0 = math.ceil(max(span[0], 0.0) * rate - 1e-6)
    k1 = math.floor(min(span[1], sim_end) * rate + 1e-6)
    if k1 - k0 < 2:
        raise LogError(
            f"{path}: less than two samples of the log fall within the simulated span (0 to {sim_end:g} s on "
            f"the scenario's clock); {alignment.detail}"
        )
    grid = np.clip(np.arange(k0, k1 + 1) / rate, span[0], span[1])  # the 1e-6 tolerance may reach a hair out
    channels = {ch: np.interp(grid, s.t - shift, v) for s in streams for ch, v in s.values.items()}
    warnings = list(sidecar.warnings)
    if alignment.reason and alignment.placed:
        warnings.append(f"{path}: {alignment.detail}")
    if hw.lowpass_hz is not None:
        if hw.lowpass_hz < rate / 2:
            names = list(channels)
            filtered = lowpass(np.vstack([channels[n] for n in names]), hw.lowpass_hz, rate)
            channels = dict(zip(names, filtered, strict=True))
        else:
            warnings.append(f"{path}: lowpass_hz {hw.lowpass_hz} is not below half of sample_rate_hz; not filtered")
    meta = {"source": str(path), "sidecar": str(sidecar.path), "robot_id": sidecar.robot_id,
            "synthetic": sidecar.synthetic, "sha256": sha256}
    trajectory = Trajectory(grid, {ch: v[None, :] for ch, v in channels.items()}, onset=task.onset, meta=meta)
    return LogTrial(
        path=path,
        sidecar_path=sidecar.path,
        sha256=sha256,
        trajectory=trajectory,
        params=sidecar.params,
        robot_id=sidecar.robot_id,
        recorded_at=sidecar.recorded_at,
        outcome=sidecar.outcome,
        notes=sidecar.notes,
        synthetic=sidecar.synthetic,
        ignored_columns=list(ignored),
        warnings=warnings,
        logged_rate_hz=float(min(rates)),
        nsamples=int(sum(len(s.t) for s in streams)),
        flags=flags,
        alignment=alignment,
        units={ch: u for s in streams for ch, u in s.units.items() if ch != "time"},
        table=streams[0].table,
    )


def _time_unit_hint(stream: Stream, span: tuple[float, float], begin: float, end: float) -> str:
    """A CSV time column in another unit than declared would cover the disturbance: say which."""
    unit = stream.units.get("time")
    if stream.table != "[hardware.columns]" or unit not in UNITS:
        return ""
    for other, (dim, fac) in UNITS.items():
        ratio = fac / UNITS[unit][1]
        if dim == "time" and other != unit and span[0] * ratio <= begin and span[1] * ratio >= end:
            return f" (is the time column in {other}, not {unit}? set unit = \"{other}\" in [hardware.time])"
    return ""
