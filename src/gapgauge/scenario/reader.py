"""Reading one TOML table of a scenario with its key path, so every refusal can name the key."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from ..errors import ScenarioError


class TableReader:
    """Walks one TOML table, recording which keys were used, so leftovers can be refused."""

    def __init__(self, path: Path, table: dict, prefix: str):
        self.path = path
        self.table = table
        self.prefix = prefix
        self.used: set[str] = set()

    def _key(self, key: str) -> str:
        return f"{self.prefix}.{key}" if self.prefix else key

    def fail(self, key: str, problem: str, fix: str) -> ScenarioError:
        return ScenarioError(f"{self.path}: key '{self._key(key)}': {problem}; {fix}")

    def has(self, key: str) -> bool:
        return key in self.table

    def get(self, key: str, kind: type | tuple, default: Any = ..., fix: str = "") -> Any:
        self.used.add(key)
        if key not in self.table:
            if default is ...:
                raise self.fail(key, "is missing", fix or "add it")
            return default
        value = self.table[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if isinstance(value, bool) and bool not in kinds:
            ok = False
        else:
            ok = isinstance(value, kinds)
        if not ok:
            want = " or ".join(k.__name__ for k in kinds)
            got = f"{type(value).__name__} {short_repr(value)}"
            raise self.fail(key, f"must be {want}, got {got}", fix or f"give a {want}")
        if isinstance(value, float) and not math.isfinite(value):
            raise self.fail(key, f"must be finite, got {value}", "give a finite number")
        return value

    def number(self, key: str, default: Any = ..., positive: bool = False, nonneg: bool = False) -> float:
        value = self.get(key, float, default)
        if value is None:
            return value
        if positive and not value > 0:
            raise self.fail(key, f"must be positive, got {value}", "give a number above 0")
        if nonneg and value < 0:
            raise self.fail(key, f"must not be negative, got {value}", "give a number of 0 or more")
        return value

    def table_at(self, key: str, default_empty: bool = True) -> TableReader:
        value = self.get(key, dict, {} if default_empty else ...)
        return TableReader(self.path, value, self._key(key))

    def finish(self) -> None:
        extra = [k for k in self.table if k not in self.used]
        if extra:
            k = extra[0]
            raise self.fail(
                k, "is not a known key", "remove it or check its spelling (see scenarios/push_recovery.toml)"
            )


def short_repr(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."
