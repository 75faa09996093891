"""Helpers shared by the log, ingest and stand-in tests: a scenario copy to vary, and hand-made logs.

The logs are written here column by column as text, independently of the stand-in's writer, so the
reader is checked against numbers we put in by hand.
"""

from __future__ import annotations

import csv
import json
import math
import re
import shutil
from pathlib import Path

import numpy as np

from gapgauge.scenario import Scenario, load_scenario

ROOT = Path(__file__).resolve().parents[1]

#: the push_recovery column map: channel -> (column, unit); a plain standing posture in those units
STANDING = {
    "ankle_pos_deg": 2.0,
    "knee_pos_deg": -5.0,
    "hip_pos_deg": 4.0,
    "ankle_vel_dps": 0.0,
    "knee_vel_dps": 0.0,
    "hip_vel_dps": 0.0,
    "ankle_tau": 5.0,
    "knee_tau": -3.0,
    "hip_tau": 2.0,
    "heel_fz": 200.0,
    "toe_fz": 190.0,
    "heel_x_mm": -45.0,
    "toe_x_mm": 137.0,
    "com_x_mm": 30.0,
    "com_z_mm": 700.0,
    "com_vx": 0.0,
    "com_vz": 0.0,
    "trunk_pitch_deg": 1.0,
}


def make_scenario(
    tmp: Path, *, lowpass: float | None = None, edits: dict[str, str] | None = None, append: str = ""
) -> Scenario:
    """A copy of scenarios/push_recovery.toml in ``tmp`` with ``lowpass_hz`` set (or removed), regex
    ``edits`` (pattern -> replacement) applied and ``append`` added at the end."""
    (tmp / "models").mkdir(parents=True, exist_ok=True)
    (tmp / "scenarios").mkdir(exist_ok=True)
    shutil.copy(ROOT / "models" / "planar_body.xml", tmp / "models" / "planar_body.xml")
    text = (ROOT / "scenarios" / "push_recovery.toml").read_text()
    text = re.sub(r"(?m)^lowpass_hz = .*$", "" if lowpass is None else f"lowpass_hz = {lowpass}", text)
    for pattern, repl in (edits or {}).items():
        text, count = re.subn(pattern, repl, text, flags=re.M)
        assert count, pattern
    path = tmp / "scenarios" / "test_scenario.toml"
    path.write_text(text + "\n" + append)
    return load_scenario(path)


def sidecar(scenario: Scenario, **overrides) -> dict:
    data = {
        "params": scenario.params_to_mapping(scenario.nominal_parameters()),
        "robot_id": "biped-02",
        "recorded_at": "2024-05-01T10:32:00+02:00",
        "outcome": "stood",
        "notes": "handheld push",
        "synthetic": False,
    }
    data.update(overrides)
    return data


def table(
    rate_hz: float = 200.0,
    duration: float = 1.2,
    columns: dict[str, float] | None = None,
    time_ms: np.ndarray | None = None,
) -> tuple[list[str], list[list[str]]]:
    """Header and rows (as text) of a standing log: the time column in ms, the rest constant."""
    columns = dict(STANDING if columns is None else columns)
    if time_ms is None:
        time_ms = np.arange(int(round(duration * rate_hz)) + 1) * (1000.0 / rate_hz)
    header = ["time_ms", *columns]
    rows = [[repr(float(t))] + [repr(v) for v in columns.values()] for t in time_ms]
    return header, rows


def write_log(
    folder: Path,
    header: list[str],
    rows: list[list[str]],
    side: dict | str | bytes | None,
    name: str = "trial_001",
) -> Path:
    """Write ``name.csv`` (one row per line) and its sidecar (a dict as JSON, or raw text)."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}.csv"
    path.write_text("\n".join(",".join(r) for r in [header, *rows]) + "\n", encoding="utf-8")
    if side is not None:
        raw = (
            side
            if isinstance(side, bytes)
            else (side if isinstance(side, str) else json.dumps(side)).encode()
        )
        (folder / f"{name}.json").write_bytes(raw)
    return path


DEG = math.pi / 180.0  # by definition of the degree (SI brochure, 9th ed., table 8)


def convert_log(src: Path, dst: Path, change: dict[str, object], sidecar_edit: dict | None = None) -> Path:
    """Copy a CSV log and its sidecar to ``dst``, applying ``change`` (column -> function of the column's
    values ``(n,)``) to the numbers: a test's own converter, to make a wrong-unit or a re-clocked log."""
    with src.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, data = rows[0], np.array(rows[1:], dtype=float)
    for column, fn in change.items():
        j = header.index(column)
        data[:, j] = fn(data[:, j])
    dst.parent.mkdir(parents=True, exist_ok=True)
    with dst.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        writer.writerows([[repr(float(v)) for v in row] for row in data])
    side = json.loads(src.with_suffix(".json").read_text())
    side.update(sidecar_edit or {})
    dst.with_suffix(".json").write_text(json.dumps(side))
    return dst


def csv_columns(path: Path) -> tuple[list[str], np.ndarray]:
    """Header and numbers of a CSV log, read with the standard library."""
    with path.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], np.array(rows[1:], dtype=float)
