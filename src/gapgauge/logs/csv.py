"""The CSV hardware log: a header row, the time column and one column per mapped channel.

Columns and units are the scenario's ``[hardware.time]`` and ``[hardware.columns]``; columns it does not
map are left unread. The file is streamed: its size is checked before it is opened, lines are decoded one
at a time (NUL bytes, bad UTF-8 and overlong lines refused with their line and column), and numbers are
converted in blocks of :data:`BLOCK_ROWS` rows.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from ..errors import LogError, where
from ..scenario import Scenario
from ..trajectory import channel_dimension
from ..units import factor
from .common import LogTrial, Stream, TriggerSamples, build_trial
from .sidecar import check_size, read_sidecar, short_repr, sidecar_path_for

#: largest single line of a CSV log, bytes (a log line is a few hundred bytes; more is not a log)
MAX_LINE_BYTES = 1 << 20
#: numbers converted per block while streaming, rows
BLOCK_ROWS = 8192


def read_csv(scenario: Scenario, path: Path) -> LogTrial:
    """Read a CSV log and its sidecar into a :class:`LogTrial` (checked and resampled by ``build_trial``).

    Raises:
        LogError: one line naming the file (and line and column), what is wrong and the fix.
    """
    if not path.is_file():
        raise LogError(f"{path}: is not a regular file; give a CSV log")
    if not scenario.hardware.columns:
        raise LogError(
            f"{path}: the scenario {scenario.path} maps no CSV columns (it has [hardware.bag] only); give a "
            "ROS 2 bag, or map the CSV's columns in [hardware.columns] and its time in [hardware.time]"
        )
    check_size(path, path.stat().st_size, scenario)
    sidecar = read_sidecar(scenario, sidecar_path_for(path))
    if sidecar.trigger is not None and sidecar.trigger.field is not None:
        raise LogError(
            f"{sidecar.path}: key 'trigger': a CSV log's trigger is a column; write \"trigger\": \"column name\""
        )
    extra = [] if sidecar.trigger is None else [sidecar.trigger.name]
    hasher = hashlib.sha256()
    stream, ignored, extra_values = read_csv_stream(scenario, path, hasher, extra, sidecar.path)
    hasher.update(b"\n--sidecar--\n")
    hasher.update(sidecar.raw)
    trigger = None
    if sidecar.trigger is not None:
        name = sidecar.trigger.name
        trigger = TriggerSamples(stream.t, extra_values[name], f"column {name!r}")
        ignored = [c for c in ignored if c != name]
    return build_trial(scenario, path, [stream], sidecar, hasher.hexdigest(), ignored, trigger=trigger)


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


def read_csv_stream(
    scenario: Scenario, path: Path, hasher: Any, extra: list[str] | None = None, sidecar_path: Path | None = None
) -> tuple[Stream, list[str], dict[str, np.ndarray]]:
    """Stream a CSV log into a :class:`Stream` in SI; return it, the ignored (unmapped) columns and the raw
    values ``(n,)`` of the ``extra`` columns (a trigger named by the sidecar at ``sidecar_path``).

    ``hasher`` (a ``hashlib`` object) is fed every raw byte read, so the file is read once.
    """
    extra = [c for c in (extra or []) if c != scenario.hardware.time_column]
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
            absent = [c for c in extra if c not in seen]
            if absent:
                raise LogError(
                    f"{sidecar_path}: key 'trigger': column {absent[0]!r} is not in {where(path, 1)}; "
                    "name a column of the log's header"
                )
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
            wanted += [(c, f"extra:{c}") for c in extra if c not in {col for col, _ in wanted}]
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
        c.channel: data[:, j + 1] * factor(c.unit, channel_dimension(c.channel)) for j, c in enumerate(hw.columns)
    }
    by_column = {col: data[:, j] for j, (col, _) in enumerate(wanted)}
    extra_values = {c: by_column[c] for c in extra}
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
    return stream, ignored, extra_values


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
            f"{where(path, line, column)}: {short_repr(text)} in column {name!r} is not a number; "
            "write plain decimal numbers (e.g. 12.5)"
        ) from None
    if not math.isfinite(value):
        raise LogError(
            f"{where(path, line, column)}: {text} in column {name!r} is not a finite number; "
            "remove or repair samples with NaN or inf (a sensor dropout?)"
        )
    return value
