"""How values are written into and read out of the store: strict JSON and npz, never pickle.

A rollout's numbers (parameters, physics draw, features) are float64 little-endian BLOBs, one per
row and column group, so 10^5 rows decode with one ``numpy.frombuffer`` each (why: see
:mod:`gapgauge.store.schema`). Everything named (trial parameters and features, model parameters,
configurations) is strict JSON with NaN and infinity as ``null``. Arrays (trial series, fitted-model
arrays) are ``.npz`` written with ``numpy.savez`` and read with ``allow_pickle=False``.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..records import RolloutBatch
from ..trajectory import Trajectory

_META_KEY = "__meta__"
_ONSET_KEY = "__onset__"
_TIME_KEY = "__t__"


def jsonable(value: Any) -> Any:
    """Plain JSON types from numpy scalars/arrays, dicts and sequences; NaN and inf become None, other
    objects (paths) their text."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, np.generic):
        return jsonable(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    return str(value)  # paths and other plain objects read back as their text


def dumps(value: Any) -> str:
    """Strict JSON (no NaN) of ``value``."""
    return json.dumps(jsonable(value), allow_nan=False, separators=(",", ":"))


def digest_text(text: str) -> str:
    """sha256 hex digest of ``text`` (UTF-8)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


FLOAT = np.dtype("<f8")  # stored byte order, whatever the machine's


def row_blobs(matrix: np.ndarray) -> list[bytes]:
    """One float64 little-endian BLOB per row of ``matrix (n x k)``; NaN stays NaN, values exact."""
    matrix = np.ascontiguousarray(matrix, dtype=FLOAT)
    return [row.tobytes() for row in matrix]


def feature_matrix(features: dict[str, np.ndarray], names: Sequence[str], n: int) -> np.ndarray:
    """``(n x len(names))`` float matrix of the named features (columns in ``names`` order)."""
    missing = [k for k in names if k not in features]
    if missing:
        raise ValueError(f"features {missing} are missing from the batch (the store expects {list(names)})")
    if not names:
        return np.empty((n, 0))
    return np.column_stack([np.asarray(features[k], dtype=float).reshape(n) for k in names])


def parse_blobs(blobs: Sequence[bytes], width: int) -> np.ndarray:
    """``(n x width)`` float array from per-row float64 BLOBs (one ``frombuffer`` for all rows)."""
    if not blobs:
        return np.empty((0, width))
    flat = np.frombuffer(b"".join(blobs), dtype=FLOAT)
    if flat.size != len(blobs) * width:
        raise ValueError(f"stored rows do not hold {width} numbers each")
    return flat.reshape(len(blobs), width).astype(float)


def empty_batch(columns: dict[str, list[str]]) -> RolloutBatch:
    """A batch of no rollouts with the right column counts."""
    return RolloutBatch(
        indices=np.empty(0, dtype=np.int64),
        params=np.empty((0, len(columns["parameters"]))),
        physics=np.empty((0, len(columns["physics"]))),
        physics_names=tuple(columns["physics"]),
        status=np.empty(0, dtype="<U8"),
        reason=np.empty(0, dtype="<U1"),
        objective=np.empty(0),
        features={k: np.empty(0) for k in columns["features"]},
        run_ids=np.empty(0, dtype=np.int64),
    )


def batch_from_rows(rows: list[tuple], columns: dict[str, list[str]]) -> RolloutBatch:
    """A :class:`RolloutBatch` from rows ``(run_id, idx, params, physics, status, reason, objective,
    features)`` of one scenario whose stored column names are ``columns``."""
    if not rows:
        return empty_batch(columns)
    run_ids, idx, params, physics, status, reason, objective, features = zip(*rows, strict=True)
    names = columns["features"]
    values = parse_blobs(features, len(names))
    return RolloutBatch(
        indices=np.array(idx, dtype=np.int64),
        params=parse_blobs(params, len(columns["parameters"])),
        physics=parse_blobs(physics, len(columns["physics"])),
        physics_names=tuple(columns["physics"]),
        status=np.array(status, dtype="<U8"),
        reason=np.array(reason, dtype=str),
        objective=np.array(objective, dtype=float),  # None (NULL) becomes NaN
        features={k: values[:, j].copy() for j, k in enumerate(names)},
        run_ids=np.array(run_ids, dtype=np.int64),
    )


def arrays_to_npz(arrays: dict[str, np.ndarray]) -> bytes:
    """``.npz`` bytes of named numeric/string arrays (object arrays are refused: they would need pickle)."""
    clean = {}
    for name, value in arrays.items():
        arr = np.asarray(value)
        if arr.dtype == object:
            raise TypeError(f"array {name!r} has dtype object, which cannot be stored without pickle")
        clean[name] = arr
    buf = io.BytesIO()
    np.savez(buf, **clean)
    return buf.getvalue()


def npz_to_arrays(blob: bytes) -> dict[str, np.ndarray]:
    """Inverse of :func:`arrays_to_npz`, never unpickling."""
    with np.load(io.BytesIO(blob), allow_pickle=False) as data:
        return {k: data[k] for k in data.files}


def trajectory_to_npz(series: Trajectory) -> bytes:
    """``.npz`` bytes of a trajectory: its time base, channels, onset and JSON meta."""
    arrays = {_TIME_KEY: series.t, _ONSET_KEY: np.array(series.onset, dtype=float),
              _META_KEY: np.array(dumps(series.meta))}
    arrays.update({f"channel:{k}": v for k, v in series.channels.items()})
    return arrays_to_npz(arrays)


def npz_to_trajectory(blob: bytes) -> Trajectory:
    """Inverse of :func:`trajectory_to_npz`."""
    arrays = npz_to_arrays(blob)
    channels = {k.split(":", 1)[1]: v for k, v in arrays.items() if k.startswith("channel:")}
    return Trajectory(arrays[_TIME_KEY], channels, float(arrays[_ONSET_KEY]), json.loads(str(arrays[_META_KEY])))
