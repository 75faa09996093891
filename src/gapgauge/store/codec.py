"""How values are written into and read out of the store: strict JSON and npz, never pickle.

Rows of numbers are JSON arrays (non-finite values as ``null``) and feature rows JSON objects, so the
store stays readable with any SQLite client. Reading many rows parses them as one JSON document,
which keeps 10^5 rollouts to well under a second of decoding (see benchmarks/sweep_throughput.py).
Arrays (trial series, fitted-model arrays) are ``.npz`` written with ``numpy.savez`` and read with
``allow_pickle=False``.
"""

from __future__ import annotations

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
    """Plain JSON types from numpy scalars/arrays, dicts and sequences; NaN and inf become None."""
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
    return value


def dumps(value: Any) -> str:
    """Strict JSON (no NaN) of ``value``."""
    return json.dumps(jsonable(value), allow_nan=False, separators=(",", ":"))


def row_arrays(matrix: np.ndarray) -> list[str]:
    """One JSON array per row of ``matrix (n x k)``; NaN as null. float64 values round-trip exactly."""
    matrix = np.asarray(matrix, dtype=float)
    if np.isfinite(matrix).all():
        return [json.dumps(row, separators=(",", ":")) for row in matrix.tolist()]
    return [dumps(row) for row in matrix.tolist()]


def feature_rows(features: dict[str, np.ndarray], n: int) -> list[str]:
    """One JSON object per rollout from ``features`` (name -> ``(n,)``); NaN as null."""
    names = list(features)
    columns = [np.asarray(features[k], dtype=float).tolist() for k in names]
    out = []
    for i in range(n):
        row = {}
        for name, column in zip(names, columns, strict=True):
            v = column[i]
            row[name] = v if math.isfinite(v) else None
        out.append(json.dumps(row, separators=(",", ":")))
    return out


def parse_matrix(texts: Sequence[str], width: int) -> np.ndarray:
    """``(n x width)`` float array from JSON array rows, parsed as one document; null -> NaN."""
    if not texts:
        return np.empty((0, width))
    values = json.loads("[" + ",".join(texts) + "]")
    return np.array(values, dtype=float).reshape(len(texts), width)


def parse_features(texts: Sequence[str], names: Sequence[str]) -> dict[str, np.ndarray]:
    """name -> ``(n,)`` float from JSON object rows; a missing or null value is NaN."""
    rows = json.loads("[" + ",".join(texts) + "]") if texts else []
    keys = list(names)
    for row in rows[:1]:
        keys += [k for k in row if k not in keys]
    return {k: np.array([row.get(k) for row in rows], dtype=float) for k in keys}


def empty_batch(dim: int, physics_names: tuple[str, ...], feature_names: Sequence[str]) -> RolloutBatch:
    """A batch of no rollouts with the right column counts."""
    return RolloutBatch(
        indices=np.empty(0, dtype=np.int64),
        params=np.empty((0, dim)),
        physics=np.empty((0, len(physics_names))),
        physics_names=physics_names,
        status=np.empty(0, dtype="<U8"),
        reason=np.empty(0, dtype=object).astype(str),
        objective=np.empty(0),
        features={k: np.empty(0) for k in feature_names},
        run_ids=np.empty(0, dtype=np.int64),
    )


def batch_from_rows(
    rows: list[tuple], dim: int, physics_names: tuple[str, ...], feature_names: Sequence[str]
) -> RolloutBatch:
    """A :class:`RolloutBatch` from rows ``(run_id, idx, params_json, physics_json, status, reason,
    objective, features_json)``."""
    if not rows:
        return empty_batch(dim, physics_names, feature_names)
    run_ids, idx, params, physics, status, reason, objective, features = zip(*rows, strict=True)
    return RolloutBatch(
        indices=np.array(idx, dtype=np.int64),
        params=parse_matrix(params, dim),
        physics=parse_matrix(physics, len(physics_names)),
        physics_names=physics_names,
        status=np.array(status, dtype="<U8"),
        reason=np.array(reason, dtype=str),
        objective=np.array([np.nan if v is None else v for v in objective], dtype=float),
        features=parse_features(features, feature_names),
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
