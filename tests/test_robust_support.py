"""Shared pieces of the robustness tests (tests/test_robust_*.py); no tests here.

A small project (a copy of push_recovery.toml with a 1.2 s horizon and its model) so that real
simulations stay cheap, the real command line as a subprocess, hand-made rollouts for stores that need
no physics, and reads of a store with the standard library's ``sqlite3`` (not through the Store).
"""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from gapgauge.records import RolloutBatch

ROOT = Path(__file__).resolve().parents[1]


def make_project(root: Path, horizon: float = 1.2, edits: dict[str, str] | None = None) -> Path:
    """Copy models/ and push_recovery.toml (horizon shortened, ``edits`` applied) into ``root``;
    returns the scenario path. The stand-in profiles come along for ``gapgauge standin``."""
    shutil.copytree(ROOT / "models", root / "models")
    shutil.copytree(ROOT / "scenarios" / "standin", root / "scenarios" / "standin")
    text = (ROOT / "scenarios" / "push_recovery.toml").read_text()
    assert "horizon = 3.0" in text
    text = text.replace("horizon = 3.0", f"horizon = {horizon}")
    for old, new in (edits or {}).items():
        assert old in text, old
        text = text.replace(old, new)
    path = root / "scenarios" / "short.toml"
    path.write_text(text)
    return path


def gapgauge(*args: str) -> list[str]:
    """The real command line, as a user runs it."""
    return [sys.executable, "-m", "gapgauge.cli", *map(str, args)]


def run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(gapgauge(*args), capture_output=True, text=True)


def scalar(path: Path, sql: str, args: tuple = ()):
    """First value of a query, read with sqlite3 directly; None while the table does not exist yet."""
    conn = sqlite3.connect(path, timeout=30)
    try:
        row = conn.execute(sql, args).fetchone()
    except sqlite3.OperationalError:
        return None
    finally:
        conn.close()
    return None if row is None else row[0]


def integrity(path: Path) -> str:
    """SQLite's own verdict."""
    return scalar(path, "PRAGMA integrity_check")


def wait_until(proc: subprocess.Popen, condition, timeout: float = 300.0) -> bool:
    """Poll ``condition()`` every 10 ms while ``proc`` runs; True once it holds."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return True
        if proc.poll() is not None:
            return bool(condition())
        time.sleep(0.01)
    return False


def sweep_rows(path: Path, kind: str = "sweep") -> list[tuple]:
    """Every rollout row of the runs of one kind: (idx, params, physics, status, reason, objective, features)."""
    conn = sqlite3.connect(path)
    try:
        return conn.execute(
            "SELECT ro.idx, ro.params, ro.physics, ro.status, ro.reason, ro.objective, ro.features FROM rollouts ro"
            " JOIN runs r ON r.id = ro.run_id WHERE r.kind = ? ORDER BY r.design, ro.idx", (kind,)).fetchall()
    finally:
        conn.close()


def assert_same_rows(got: list[tuple], want: list[tuple]) -> None:
    """Index, parameters, physics draw, status and reason identical; objective and features to 1e-12
    relative (a sum's order may depend on how many rollouts share a batch)."""
    assert len(got) == len(want)
    assert [r[:5] for r in got] == [r[:5] for r in want]
    np.testing.assert_allclose([np.nan if r[5] is None else r[5] for r in got],
                               [np.nan if r[5] is None else r[5] for r in want], rtol=1e-12)
    np.testing.assert_allclose(np.frombuffer(b"".join(r[6] for r in got), dtype="<f8"),
                               np.frombuffer(b"".join(r[6] for r in want), dtype="<f8"), rtol=1e-12)


def fake_batch(scenario, indices, seed: int = 0, params: np.ndarray | None = None) -> RolloutBatch:
    """Hand-made rollouts (no physics), all ok with finite features, for stores whose numbers do not matter."""
    rng = np.random.default_rng(seed)
    indices = np.asarray(indices, dtype=np.int64)
    n = len(indices)
    features = {name: rng.random(n) for name in scenario.features.names}
    features["fell"] = np.zeros(n)
    if params is None:
        params = scenario.from_unit(rng.random((n, scenario.dim)))
    return RolloutBatch(
        indices=indices, params=np.asarray(params, dtype=float).reshape(n, scenario.dim),
        physics=np.tile([r.nominal for r in scenario.physics], (n, 1)),
        physics_names=tuple(r.name for r in scenario.physics), status=np.array(["ok"] * n),
        reason=np.array([""] * n, dtype=object), objective=rng.random(n), features=features,
    )
