"""What every hardware log reader shares: the trial record, the sidecar, the sample checks, resampling.

A reader (:mod:`.csv`, :mod:`.bag`) turns its file into :class:`Stream` objects in SI and hands them with
the :class:`Sidecar` to :func:`build_trial`, which checks the samples, resamples every channel onto
``k / sample_rate_hz`` over the logged span and low-passes it when ``[hardware].lowpass_hz`` is set.
The contract and the checks are described in :mod:`gapgauge.logs`.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import GapgaugeError, LogError, where
from ..observe import lowpass
from ..scenario import Scenario
from ..scenario.model_info import joint_ranges
from ..trajectory import CHANNELS, JOINTS, Trajectory
from ..units import UNITS

#: largest sidecar JSON, bytes
MAX_SIDECAR_BYTES = 1 << 20
#: slack beyond the model's joint range before an angle counts as impossible, rad (soft limits give a little)
JOINT_LIMIT_SLACK = 0.1
OUTCOMES = ("stood", "fell")
SIDECAR_KEYS = ("params", "robot_id", "recorded_at", "outcome", "notes", "synthetic")

@dataclass
class LogTrial:
    """One hardware trial as read from its log and sidecar, validated and in SI.

    Attributes:
        path: the log (CSV file, bag folder or bag file).
        sidecar_path: the sidecar JSON beside it.
        sha256: hex digest identifying the trial: the log's bytes followed by the sidecar's.
        trajectory: batch of one on the common time base ``t (nstep,) s`` (``k / sample_rate_hz``),
            every mapped channel ``(1 x nstep)`` in SI, ``onset`` = ``scenario.task.onset``.
        params: policy parameters by name, in scenario units (inside the scenario's bounds).
        robot_id, recorded_at, outcome, notes, synthetic: the sidecar's fields (outcome ``"stood"``,
            ``"fell"`` or None when the operator gave none).
        ignored_columns: CSV columns (or bag topics) the scenario does not map, left unread.
        warnings: things worth a look that did not stop the trial (e.g. parameters outside the safe bounds).
        logged_rate_hz: median sampling rate of the raw log, Hz.
        nsamples: raw samples read (rows of the CSV).
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


@dataclass
class Sidecar:
    """The sidecar JSON of a log, validated. ``raw`` is its bytes (they enter the trial's sha256)."""

    path: Path
    params: dict[str, float]
    robot_id: str
    recorded_at: str
    outcome: str | None
    notes: str
    synthetic: bool
    raw: bytes
    warnings: list[str]


@dataclass
class Stream:
    """Samples of some channels on one raw time base, already in SI (one CSV, or one bag topic).

    Attributes:
        t: ``(n,)`` s, as logged (validated by :func:`build_trial`).
        values: channel -> ``(n,)`` SI.
        units: channel -> the unit the log declared (for the degrees-or-radians hint).
        labels: channel -> the column or field it came from (for messages).
        locate: sample index -> location text, e.g. ``"trial.csv:17"``.
        locate_cell: (sample index, channel) -> location text with the column, e.g. ``"trial.csv:17:4"``.
    """

    t: np.ndarray
    values: dict[str, np.ndarray]
    units: dict[str, str]
    labels: dict[str, str]
    locate: Callable[[int], str]
    locate_cell: Callable[[int, str], str]


# ---- the sidecar and the file size ------------------------------------------------------------


def sidecar_path_for(path: Path) -> Path:
    """Sidecar of a log: ``trial_003.csv``, ``.mcap`` or folder ``trial_003`` -> ``trial_003.json``."""
    name = path.name if path.is_dir() else path.stem
    return path.parent / f"{name}.json"


def check_size(path: Path, size: int, scenario: Scenario) -> None:
    """Refuse a log over ``[hardware].max_file_mb`` (10^6 bytes per MB) or an empty one, before reading it."""
    limit = scenario.hardware.max_file_mb * 1e6
    if size > limit:
        raise LogError(
            f"{path}: {size / 1e6:.1f} MB is over the limit of {scenario.hardware.max_file_mb:g} MB "
            "([hardware].max_file_mb); split the log per trial or raise the limit in the scenario"
        )
    if size == 0:
        raise LogError(f"{path}: the file is empty; give the trial's log with a header row and data rows")


def read_sidecar(scenario: Scenario, path: Path) -> Sidecar:
    """Read and validate a sidecar JSON (see the module docstring for its fields).

    Raises:
        LogError: missing, too big, not UTF-8, not JSON, wrong types, parameters missing, unknown or
            outside the scenario's bounds.
    """
    if not path.is_file():
        raise LogError(
            f"{path}: sidecar JSON is missing; write it beside the log with the same stem: "
            '{"params": {...}, "robot_id": "...", "recorded_at": "2024-05-01T10:00:00", "outcome": null}'
        )
    size = path.stat().st_size
    if size > MAX_SIDECAR_BYTES:
        raise LogError(
            f"{path}: sidecar is {size} bytes, more than {MAX_SIDECAR_BYTES}; it should hold a few fields"
        )
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, col = _line_col(raw, exc.start)
        raise LogError(
            f"{where(path, line, col)}: sidecar is not UTF-8 text; save it as UTF-8 JSON"
        ) from None

    def no_constants(name: str) -> Any:
        raise ValueError(f"{name} is not a JSON number")

    try:
        data = json.loads(text, parse_constant=no_constants)
    except json.JSONDecodeError as exc:
        raise LogError(
            f"{where(path, exc.lineno, exc.colno)}: sidecar is not valid JSON ({exc.msg}); fix it there"
        ) from None
    except RecursionError:
        raise LogError(f"{path}: sidecar JSON is nested too deeply; it should be one flat object") from None
    except ValueError as exc:
        raise LogError(
            f"{path}: sidecar JSON holds an unusable value ({exc}); use plain finite numbers"
        ) from None
    if not isinstance(data, dict):
        raise LogError(
            f'{path}: sidecar must be a JSON object {{"params": {{...}}, ...}}, got {type(data).__name__}'
        )

    def fail(key: str, problem: str, fix: str) -> LogError:
        return LogError(f"{path}: key '{key}': {problem}; {fix}")

    params = data.get("params")
    if params is None:
        raise fail("params", "is missing", "give the trial's parameter values by name")
    if not isinstance(params, dict):
        raise fail(
            "params",
            f"must be an object of name: value, got {type(params).__name__}",
            'write {"name": value, ...}',
        )
    try:
        vector = scenario.params_from_mapping(params, source=f"{path}: key 'params'")
    except GapgaugeError as exc:
        raise LogError(str(exc)) from None
    values = scenario.params_to_mapping(vector)
    warnings = []
    outside = [p.name for p in scenario.parameters if not p.safe_low <= values[p.name] <= p.safe_high]
    if outside:
        warnings.append(f"{path}: parameter(s) {', '.join(outside)} outside the safe bounds for hardware")

    robot_id = data.get("robot_id")
    if not isinstance(robot_id, str) or not robot_id.strip() or len(robot_id) > 200:
        raise fail(
            "robot_id",
            f"must be a non-empty string of at most 200 characters, got {short_repr(robot_id)}",
            'name the robot, e.g. "robot_id": "biped-02"',
        )
    recorded_at = data.get("recorded_at")
    if not isinstance(recorded_at, str) or len(recorded_at) > 64:
        raise fail(
            "recorded_at",
            f"must be an ISO-8601 string, got {short_repr(recorded_at)}",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        )
    try:
        datetime.fromisoformat(recorded_at.replace("Z", "+00:00"))
    except ValueError:
        raise fail(
            "recorded_at",
            f"{short_repr(recorded_at)} is not an ISO-8601 date and time",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        ) from None
    outcome = data.get("outcome")
    if outcome is not None and outcome not in OUTCOMES:
        raise fail("outcome", f'must be "stood", "fell" or null, got {short_repr(outcome)}', "use one of those")
    notes = data.get("notes", "")
    if notes is None:
        notes = ""
    if not isinstance(notes, str) or len(notes) > 10_000:
        raise fail(
            "notes",
            f"must be a string of at most 10000 characters, got {short_repr(notes)}",
            "write the notes as text",
        )
    synthetic = data.get("synthetic", False)
    if not isinstance(synthetic, bool):
        raise fail("synthetic", f"must be true or false, got {short_repr(synthetic)}", "use a JSON boolean")
    extra = [k for k in data if k not in SIDECAR_KEYS]
    if extra:
        warnings.append(
            f"{path}: sidecar key(s) {', '.join(map(repr, extra[:5]))} not in the contract, ignored"
        )
    return Sidecar(path, values, robot_id, recorded_at, outcome, notes, synthetic, raw, warnings)


# ---- checks, resampling, filtering ------------------------------------------------------------------


def build_trial(
    scenario: Scenario,
    path: Path,
    streams: list[Stream],
    sidecar: Sidecar,
    sha256: str,
    ignored: list[str],
) -> LogTrial:
    """Validate raw streams, resample them onto one time base and filter; the :class:`LogTrial`.

    Each stream's ``t (n,) s`` must be finite, strictly increasing, without gaps over ``max_gap_s`` and
    not slower than ``min_rate_hz``, and must span the disturbance (``onset`` to ``onset + duration``).
    The common base is ``t_k = k / sample_rate_hz`` over the span all streams cover; each channel is
    linearly interpolated onto it (``numpy.interp``) and then, if ``lowpass_hz`` is set, filtered with
    a Butterworth low-pass run forwards and backwards (``scipy.signal.sosfiltfilt``: zero phase).
    """
    hw = scenario.hardware
    limits = plausible_limits(scenario)
    rates = []
    for stream in streams:
        _check_time(scenario, stream)
        for channel, values in stream.values.items():
            _check_finite(stream, channel, values)
            if channel in limits:
                _check_range(stream, channel, values, limits[channel])
        rates.append(1.0 / float(np.median(np.diff(stream.t))))
    start = max(float(s.t[0]) for s in streams)
    end = min(float(s.t[-1]) for s in streams)
    rate = hw.sample_rate_hz
    k0 = math.ceil(start * rate - 1e-6)
    k1 = math.floor(end * rate + 1e-6)
    if k1 - k0 < 2:
        raise LogError(
            f"{path}: the channels share less than two samples of time; log them over the same span"
        )
    grid = np.arange(k0, k1 + 1) / rate
    grid = np.clip(grid, start, end)  # the 1e-6 tolerance above may reach a hair outside
    channels = {}
    for stream in streams:
        for channel, values in stream.values.items():
            channels[channel] = np.interp(grid, stream.t, values)
    warnings = list(sidecar.warnings)
    if hw.lowpass_hz is not None:
        if hw.lowpass_hz < rate / 2:
            names = list(channels)
            filtered = lowpass(np.vstack([channels[n] for n in names]), hw.lowpass_hz, rate)
            channels = dict(zip(names, filtered, strict=True))
        else:
            warnings.append(
                f"{path}: lowpass_hz {hw.lowpass_hz} is not below half of sample_rate_hz; not filtered"
            )
    meta = {
        "source": str(path),
        "sidecar": str(sidecar.path),
        "robot_id": sidecar.robot_id,
        "synthetic": sidecar.synthetic,
        "sha256": sha256,
    }
    trajectory = Trajectory(
        grid, {ch: v[None, :] for ch, v in channels.items()}, onset=scenario.task.onset, meta=meta
    )
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
    )


def _check_time(scenario: Scenario, s: Stream) -> None:
    hw, task = scenario.hardware, scenario.task
    t = s.t
    label = s.labels.get("time", "time")
    _check_finite(s, "time", t)
    if len(t) < 2:
        raise LogError(
            f"{s.locate(0)}: only one sample; a trial needs its samples over the whole disturbance"
        )
    dt = np.diff(t)
    bad = np.flatnonzero(dt <= 0)
    if bad.size:
        i = int(bad[0]) + 1
        if dt[i - 1] == 0:
            raise LogError(
                f"{s.locate_cell(i, 'time')}: time {t[i]:g} s repeats the previous sample's; "
                f"remove the duplicated sample (column {label!r})"
            )
        raise LogError(
            f"{s.locate_cell(i, 'time')}: time goes backwards ({t[i - 1]:g} s then {t[i]:g} s); "
            "sort the samples by time or check the logger's clock"
        )
    gap = int(np.argmax(dt))
    if dt[gap] > hw.max_gap_s:
        raise LogError(
            f"{s.locate_cell(gap + 1, 'time')}: gap of {dt[gap]:.4g} s since the previous sample, longer "
            f"than max_gap_s = {hw.max_gap_s:g} s; samples were lost there: repeat the trial "
            "or raise [hardware].max_gap_s"
        )
    rate = 1.0 / float(np.median(dt))
    if rate < hw.min_rate_hz:
        raise LogError(
            f"{s.locate(0)}: sampled at {rate:.4g} Hz, slower than min_rate_hz = {hw.min_rate_hz:g} Hz "
            f"that the features need; log faster (the scenario expects {hw.sample_rate_hz:g} Hz)"
            + _time_unit_hint(s, rate, hw.min_rate_hz)
        )
    end = task.onset + task.duration
    if t[0] > task.onset or t[-1] < end:
        raise LogError(
            f"{s.locate(0)}: the log spans {t[0]:.6g} s to {t[-1]:.6g} s but must cover the disturbance "
            f"({task.onset:g} s to {end:g} s); time is seconds since trial start, in the unit of "
            f"[hardware.time] ({hw.time_unit})"
        )


def _time_unit_hint(s: Stream, rate: float, min_rate: float) -> str:
    unit = s.units.get("time")
    for other, (dim, fac) in UNITS.items():
        if dim == "time" and other != unit and rate * UNITS[unit][1] / fac >= min_rate:
            return f" (or is the time column in {other}, not {unit}?)"
    return ""


def _check_finite(s: Stream, channel: str, values: np.ndarray) -> None:
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = int(bad[0])
        raise LogError(
            f"{s.locate_cell(i, channel)}: {values[i]} in {s.labels.get(channel, channel)!r} is not a "
            "finite number; remove or repair samples with NaN or inf"
        )


def _check_range(s: Stream, channel: str, values: np.ndarray, limits: tuple[float, float, str]) -> None:
    low, high, why = limits
    bad = np.flatnonzero((values < low) | (values > high))
    if not bad.size:
        return
    i = int(bad[0])
    unit = s.units.get(channel, "")
    scale = UNITS[unit][1] if unit in UNITS else 1.0
    raise LogError(
        f"{s.locate_cell(i, channel)}: {values[i] / scale:.6g} {unit} in "
        f"{s.labels.get(channel, channel)!r} is "
        f"beyond {why} [{low / scale:.6g}, {high / scale:.6g}] {unit}"
        + _unit_hint(channel, unit, values / scale, low, high)
    )


def _unit_hint(channel: str, unit: str, raw: np.ndarray, low: float, high: float) -> str:
    """Suggest another unit of the same dimension under which every raw value would be plausible."""
    dim = CHANNELS[channel][0]
    for other, (odim, fac) in UNITS.items():
        if odim == dim and other != unit:
            si = raw * fac
            if np.all((si >= low) & (si <= high)):
                return (
                    f"; the values look like {other}, not {unit}: "
                    f'set unit = "{other}" for {channel} in [hardware.columns]'
                )
    return "; check the sensor and the unit declared in [hardware.columns]"


def plausible_limits(scenario: Scenario) -> dict[str, tuple[float, float, str]]:
    """Channel -> (low, high, what) in SI: ``[hardware.plausible]`` intersected with the model's joint ranges.

    Joint ranges are those of the compiled model (:func:`gapgauge.scenario.model_info.joint_ranges`,
    radians whatever ``<compiler angle>`` says) for the hinges ``ankle``, ``knee``, ``hip``, widened by
    :data:`JOINT_LIMIT_SLACK` rad on each side, as contact with a soft limit can pass it slightly.

    Raises:
        ScenarioError: the model does not compile.
    """
    out: dict[str, tuple[float, float, str]] = {
        ch: (lo, hi, "the plausible range") for ch, (lo, hi) in scenario.hardware.plausible.items()
    }
    ranges = joint_ranges(scenario)
    for name in JOINTS:
        if name not in ranges:
            continue
        lo, hi = ranges[name][0] - JOINT_LIMIT_SLACK, ranges[name][1] + JOINT_LIMIT_SLACK
        channel = f"{name}_angle"
        if channel in out:
            plo, phi, _ = out[channel]
            if lo > plo + 1e-9 or hi < phi - 1e-9:
                out[channel] = (max(lo, plo), min(hi, phi), "the joint limit or plausible range")
        else:
            out[channel] = (lo, hi, "the model's joint limit")
    return out


def _line_col(raw: bytes, offset: int) -> tuple[int, int]:
    before = raw[:offset]
    line = before.count(b"\n") + 1
    return line, offset - (before.rfind(b"\n") + 1) + 1


def short_repr(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."
