"""Hardware log readers: CSV + sidecar JSON (and ROS 2 bags / MCAP via :mod:`gapgauge.store.bag`).

The hardware log contract (DESIGN.md section 4, DEVELOPERS.md "Hardware log"): one CSV per trial with
a header row, the time column and one column per mapped channel, units as the scenario's
``[hardware.time]`` and ``[hardware.columns]`` declare them; beside it a sidecar JSON with the same
stem (``trial_003.csv`` + ``trial_003.json``)::

    {"params": {name: value}, "robot_id": str, "recorded_at": ISO-8601,
     "outcome": "stood" | "fell" | null, "notes": str, "synthetic": bool}

Log time is seconds since the start of the trial, on the scenario's clock: the disturbance begins at
``scenario.task.onset``. :func:`read_log` converts every column to SI with the exact factors of
:mod:`gapgauge.units`, checks the samples (finite, time strictly increasing, no gap longer than
``max_gap_s``, not slower than ``min_rate_hz``, inside plausible ranges and the model's joint limits),
resamples every channel by linear interpolation onto a common time base ``k / sample_rate_hz`` over the
logged span, and low-passes it when ``[hardware].lowpass_hz`` is set (Butterworth, zero phase). Anything
wrong is refused with a one-line :class:`LogError` naming the file, line and column, what is wrong and
the fix. The file is streamed: its size is checked before it is opened, and lines are decoded one at a
time.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import json
import math
import xml.etree.ElementTree as ET
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from ..errors import GapgaugeError, LogError, where
from ..observe import lowpass
from ..scenario import Scenario
from ..trajectory import CHANNELS, JOINTS, Trajectory
from ..units import UNITS, factor

#: largest single line of a CSV log, bytes (a log line is a few hundred bytes; more is not a log)
MAX_LINE_BYTES = 1 << 20
#: largest sidecar JSON, bytes
MAX_SIDECAR_BYTES = 1 << 20
#: numbers converted per block while streaming, rows
BLOCK_ROWS = 8192
#: slack beyond the model's joint range before an angle counts as impossible, rad (soft limits give a little)
JOINT_LIMIT_SLACK = 0.1
#: Butterworth order of the optional low-pass (sosfiltfilt doubles it: zero phase, order 8 magnitude)
OUTCOMES = ("stood", "fell")
SIDECAR_KEYS = ("params", "robot_id", "recorded_at", "outcome", "notes", "synthetic")
BAG_SUFFIXES = (".mcap", ".db3")


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


# ---- entry point ---------------------------------------------------------------------------------


def read_log(scenario: Scenario, path: str | Path) -> LogTrial:
    """Read, validate and resample one hardware log and its sidecar.

    Args:
        scenario: the scenario whose ``[hardware]`` table maps the log's columns.
        path: a ``.csv`` log, or a ROS 2 bag (folder, ``.mcap`` or ``.db3`` file; needs the ``rosbag``
            extra). The sidecar JSON has the same stem beside it.

    Returns:
        :class:`LogTrial` with the trajectory in SI on ``t = k / sample_rate_hz`` over the logged span.

    Raises:
        LogError: one line naming the file (and line and column), what is wrong and the fix.
    """
    path = Path(path)
    try:
        return _read_log(scenario, path)
    except OSError as exc:  # permissions, a vanished file, a device: the user's to fix
        raise LogError(
            f"{path}: cannot be read ({exc.strerror or exc}); check the file and its permissions"
        ) from None


def _read_log(scenario: Scenario, path: Path) -> LogTrial:
    if not path.exists():
        raise LogError(f"{path}: file not found; check the path")
    if path.is_dir() or path.suffix.lower() in BAG_SUFFIXES:
        from .bag import read_bag

        return read_bag(scenario, path)
    if path.suffix.lower() != ".csv":
        raise LogError(f"{path}: not a .csv log; give a CSV log, a ROS 2 bag folder or an .mcap / .db3 file")
    if not path.is_file():
        raise LogError(f"{path}: is not a regular file; give a CSV log")
    check_size(path, path.stat().st_size, scenario)
    sidecar = read_sidecar(scenario, sidecar_path_for(path))
    hasher = hashlib.sha256()
    stream, ignored = read_csv_stream(scenario, path, hasher)
    hasher.update(b"\n--sidecar--\n")
    hasher.update(sidecar.raw)
    return build_trial(scenario, path, [stream], sidecar, hasher.hexdigest(), ignored)


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


# ---- the sidecar ---------------------------------------------------------------------------------


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
            f"must be a non-empty string of at most 200 characters, got {_short(robot_id)}",
            'name the robot, e.g. "robot_id": "biped-02"',
        )
    recorded_at = data.get("recorded_at")
    if not isinstance(recorded_at, str) or len(recorded_at) > 64:
        raise fail(
            "recorded_at",
            f"must be an ISO-8601 string, got {_short(recorded_at)}",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        )
    try:
        datetime.fromisoformat(recorded_at.replace("Z", "+00:00"))
    except ValueError:
        raise fail(
            "recorded_at",
            f"{_short(recorded_at)} is not an ISO-8601 date and time",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        ) from None
    outcome = data.get("outcome")
    if outcome is not None and outcome not in OUTCOMES:
        raise fail("outcome", f'must be "stood", "fell" or null, got {_short(outcome)}', "use one of those")
    notes = data.get("notes", "")
    if notes is None:
        notes = ""
    if not isinstance(notes, str) or len(notes) > 10_000:
        raise fail(
            "notes",
            f"must be a string of at most 10000 characters, got {_short(notes)}",
            "write the notes as text",
        )
    synthetic = data.get("synthetic", False)
    if not isinstance(synthetic, bool):
        raise fail("synthetic", f"must be true or false, got {_short(synthetic)}", "use a JSON boolean")
    extra = [k for k in data if k not in SIDECAR_KEYS]
    if extra:
        warnings.append(
            f"{path}: sidecar key(s) {', '.join(map(repr, extra[:5]))} not in the contract, ignored"
        )
    return Sidecar(path, values, robot_id, recorded_at, outcome, notes, synthetic, raw, warnings)


# ---- the CSV ---------------------------------------------------------------------------------


def _decoded_lines(fh: BinaryIO, path: Path, hasher: Any) -> Iterator[str]:
    """Yield the file's lines as text, one at a time, refusing NUL bytes, bad UTF-8 and overlong lines."""
    lineno = 0
    decoder = codecs.getincrementaldecoder("utf-8")()
    while True:
        raw = fh.readline(MAX_LINE_BYTES + 1)
        if not raw:
            return
        lineno += 1
        hasher.update(raw)
        if len(raw) > MAX_LINE_BYTES:
            raise LogError(
                f"{where(path, lineno)}: line is longer than {MAX_LINE_BYTES} bytes; this is not a log CSV"
            )
        nul = raw.find(b"\x00")
        if nul >= 0:
            raise LogError(
                f"{where(path, lineno, nul + 1)}: NUL byte: binary data, not CSV text; "
                "give the CSV export of the log"
            )
        try:
            text = decoder.decode(raw, final=True)
        except UnicodeDecodeError as exc:
            raise LogError(
                f"{where(path, lineno, exc.start + 1)}: not UTF-8 text; export the log as UTF-8 CSV"
            ) from None
        if lineno == 1:
            text = text.lstrip("\ufeff")
        yield text


def read_csv_stream(scenario: Scenario, path: Path, hasher: Any) -> tuple[Stream, list[str]]:
    """Stream a CSV log into a :class:`Stream` in SI; return it and the ignored (unmapped) columns.

    ``hasher`` (a ``hashlib`` object) is fed every raw byte read, so the file is read once.
    """
    hw = scenario.hardware
    with path.open("rb") as fh:
        reader = csv.reader(_decoded_lines(fh, path, hasher), strict=True)
        try:
            header = next(reader, None)
            if header is None or not any(h.strip() for h in header):
                raise LogError(
                    f"{where(path, 1)}: no header row; the first line names the columns "
                    f"({hw.time_column}, {', '.join(c.column for c in hw.columns[:3])}, ...)"
                )
            names = [h.strip() for h in header]
            seen: dict[str, int] = {}
            for i, name in enumerate(names):
                if name in seen:
                    raise LogError(
                        f"{where(path, 1, i + 1)}: column {name!r} appears twice in the header; "
                        "give each column one name"
                    )
                seen[name] = i
            wanted = [(hw.time_column, "time")] + [(c.column, c.channel) for c in hw.columns]
            missing = [(col, ch) for col, ch in wanted if col not in seen]
            if missing:
                what = ", ".join(f"{col!r} ({ch})" for col, ch in missing[:6])
                more = f" and {len(missing) - 6} more" if len(missing) > 6 else ""
                raise LogError(
                    f"{where(path, 1)}: missing column(s) {what}{more} that the scenario maps; "
                    "add them or fix [hardware.columns] / [hardware.time] in the scenario"
                )
            ignored = [n for n in names if n not in {col for col, _ in wanted}]
            index = np.array([seen[col] for col, _ in wanted])
            ncols = len(names)
            blocks: list[np.ndarray] = []
            line_blocks: list[np.ndarray] = []
            rows: list[list[float]] = []
            lines: list[int] = []
            pending: tuple[int, int] | None = None  # a ragged row seen: (line, fields)
            for row in reader:
                if pending is not None:
                    raise LogError(
                        f"{where(path, pending[0])}: row has {pending[1]} fields, the header has {ncols}; "
                        "give every row one value per column"
                    )
                if not row:
                    continue
                line = reader.line_num
                if len(row) != ncols:
                    pending = (line, len(row))
                    continue
                values = []
                for k, (col, _channel) in zip(index, wanted, strict=True):
                    values.append(_number(row[k], path, line, int(k) + 1, col))
                rows.append(values)
                lines.append(line)
                if len(rows) >= BLOCK_ROWS:
                    blocks.append(np.array(rows, dtype=float))
                    line_blocks.append(np.array(lines, dtype=np.int64))
                    rows, lines = [], []
            if pending is not None:
                raise LogError(
                    f"{where(path, pending[0])}: truncated last row ({pending[1]} of {ncols} fields); "
                    "the log was cut off: copy it again from the robot or delete the partial row"
                )
        except csv.Error as exc:
            raise LogError(
                f"{where(path, reader.line_num)}: not readable as CSV ({exc}); "
                "check quoting and line endings there"
            ) from None
    if rows:
        blocks.append(np.array(rows, dtype=float))
        line_blocks.append(np.array(lines, dtype=np.int64))
    if not blocks:
        raise LogError(f"{path}: header only, no data rows; give the trial's samples below the header")
    data = np.concatenate(blocks)
    line_of = np.concatenate(line_blocks)
    tfac = factor(hw.time_unit, "time")
    values = {
        c.channel: data[:, j + 1] * factor(c.unit, CHANNELS[c.channel][0]) for j, c in enumerate(hw.columns)
    }
    col_of = {c.channel: seen[c.column] + 1 for c in hw.columns}
    col_of["time"] = seen[hw.time_column] + 1
    stream = Stream(
        t=data[:, 0] * tfac,
        values=values,
        units={c.channel: c.unit for c in hw.columns} | {"time": hw.time_unit},
        labels={c.channel: c.column for c in hw.columns} | {"time": hw.time_column},
        locate=lambda i: where(path, int(line_of[i])),
        locate_cell=lambda i, ch: f"{where(path, int(line_of[i]), col_of[ch])}",
    )
    return stream, ignored


def _number(cell: str, path: Path, line: int, column: int, name: str) -> float:
    text = cell.strip()
    if not text:
        raise LogError(
            f"{where(path, line, column)}: empty cell in column {name!r}; every sample needs a number"
        )
    try:
        value = float(text)
    except ValueError:
        raise LogError(
            f"{where(path, line, column)}: {_short(text)} in column {name!r} is not a number; "
            "write plain decimal numbers (e.g. 12.5)"
        ) from None
    if not math.isfinite(value):
        raise LogError(
            f"{where(path, line, column)}: {text} in column {name!r} is not a finite number; "
            "remove or repair samples with NaN or inf (a sensor dropout?)"
        )
    return value


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

    Joint ranges (MJCF ``range`` of the hinge joints ``ankle``, ``knee``, ``hip``) get
    :data:`JOINT_LIMIT_SLACK` rad on each side, as contact with a soft limit can pass it slightly.
    """
    out: dict[str, tuple[float, float, str]] = {
        ch: (lo, hi, "the plausible range") for ch, (lo, hi) in scenario.hardware.plausible.items()
    }
    try:
        root = ET.parse(scenario.model_path).getroot()
    except (ET.ParseError, OSError):  # the scenario loader already checked the model; be lenient here
        return out
    for joint in root.iter("joint"):
        name = joint.get("name")
        rng = joint.get("range")
        if name not in JOINTS or not rng:
            continue
        try:
            lo, hi = (float(v) for v in rng.split())
        except ValueError:
            continue
        lo, hi = lo - JOINT_LIMIT_SLACK, hi + JOINT_LIMIT_SLACK
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


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."
