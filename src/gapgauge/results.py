"""Typed results: the one way a job's outcome is saved, loaded, printed as JSON and handed to the report.

Every job of the application layer (sweep, ingest, shift, prior, proposals, budget, calibration)
returns a dataclass that derives from :class:`Result`. It names its ``kind`` (the key it is stored
under) and a ``schema_version`` (raised whenever a field changes meaning), and it round-trips through
strict JSON with :meth:`Result.to_dict` / :meth:`Result.from_dict`:

- nested dataclasses, lists, tuples and ``dict[str, ...]`` are rebuilt from the field type hints;
- ``numpy.ndarray`` fields become nested lists and come back as float arrays;
- non-finite floats are written as the strings ``"nan"``, ``"inf"`` and ``"-inf"`` (strict JSON has
  no NaN) and read back as floats, so a missing value and a zero never look alike;
- paths are written as text and read back as :class:`pathlib.Path`.

Fields whose name starts with an underscore, and fields declared with ``metadata={"stored": False}``,
are left out of the JSON (live objects such as fitted models travel beside the result, not in it).
"""

from __future__ import annotations

import dataclasses
import json
import math
import types
import typing
from pathlib import Path
from typing import Any, ClassVar, TypeVar

import numpy as np

from .errors import GapgaugeError, StoreError

R = TypeVar("R", bound="Result")

_NON_FINITE = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}


def _encode(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: _encode(getattr(value, f.name)) for f in _stored_fields(type(value))}
    if isinstance(value, dict):
        return {str(k): _encode(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_encode(v) for v in value]
    if isinstance(value, np.ndarray):
        return _encode(value.tolist())
    if isinstance(value, np.generic):
        return _encode(value.item())
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, (str, int, bool)) or value is None:
        return value
    raise TypeError(f"cannot store a value of type {type(value).__name__} in a result")


def _stored_fields(cls: type) -> list[dataclasses.Field]:
    return [f for f in dataclasses.fields(cls) if not f.name.startswith("_") and f.metadata.get("stored", True)]


def _float(value: Any) -> Any:
    if isinstance(value, str) and value in _NON_FINITE:
        return _NON_FINITE[value]
    return value


def _decode(hint: Any, value: Any) -> Any:
    if value is None:
        return None
    origin = typing.get_origin(hint)
    if origin is typing.Union or origin is types.UnionType:
        options = [a for a in typing.get_args(hint) if a is not type(None)]
        for option in options:
            try:
                return _decode(option, value)
            except (TypeError, ValueError, KeyError):
                continue
        return value
    if hint is Any or hint is object:
        return value
    if hint is float:
        return float(_float(value))
    if hint is int:
        return int(value)
    if hint is bool:
        return bool(value)
    if hint is str:
        if not isinstance(value, str):
            raise TypeError(f"expected text, got {type(value).__name__}")
        return value
    if hint is Path:
        return Path(value)
    if hint is np.ndarray:
        return np.asarray(_nested_float(value), dtype=float)
    if isinstance(hint, type) and dataclasses.is_dataclass(hint):
        return _from_fields(hint, value)
    if origin in (list, typing.List):  # noqa: UP006 - the typing alias can still appear in hints
        (item,) = typing.get_args(hint) or (Any,)
        return [_decode(item, v) for v in value]
    if origin is tuple:
        args = typing.get_args(hint)
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_decode(args[0], v) for v in value)
        if args:
            return tuple(_decode(a, v) for a, v in zip(args, value, strict=True))
        return tuple(value)
    if origin is dict:
        args = typing.get_args(hint)
        item = args[1] if len(args) == 2 else Any
        return {k: _decode(item, v) for k, v in value.items()}
    if origin is typing.Literal:
        return value
    return _float(value) if isinstance(value, str) else value


def _nested_float(value: Any) -> Any:
    if isinstance(value, list):
        return [_nested_float(v) for v in value]
    return math.nan if value is None else _float(value)


def _from_fields(cls: type, data: dict[str, Any]) -> Any:
    if not isinstance(data, dict):
        raise TypeError(f"{cls.__name__}: expected a table, got {type(data).__name__}")
    hints = typing.get_type_hints(cls)
    kwargs = {}
    for f in _stored_fields(cls):
        if f.name in data:
            kwargs[f.name] = _decode(hints.get(f.name, Any), data[f.name])
    return cls(**kwargs)


@dataclasses.dataclass
class Result:
    """Base of every stored result: ``kind`` and ``schema_version`` are class attributes."""

    kind: ClassVar[str] = "result"
    schema_version: ClassVar[int] = 1

    def to_dict(self) -> dict[str, Any]:
        """Strict-JSON form: ``{"kind", "schema_version", <fields>}``."""
        return {"kind": self.kind, "schema_version": self.schema_version, **_encode(self)}

    @classmethod
    def from_dict(cls: type[R], data: dict[str, Any]) -> R:
        """Rebuild from :meth:`to_dict`; a different ``kind`` or ``schema_version`` is a StoreError."""
        if data.get("kind", cls.kind) != cls.kind:
            raise StoreError(f"a stored {data.get('kind')!r} result was read as {cls.kind!r}; this is a bug")
        version = data.get("schema_version")
        if version != cls.schema_version:
            raise StoreError(
                f"the stored {cls.kind} result has schema version {version}, this gapgauge reads "
                f"{cls.schema_version}; run the {cls.kind} step again to store a current one"
            )
        return _from_fields(cls, {k: v for k, v in data.items() if k not in ("kind", "schema_version")})

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False)

    def write_json(self, path: str | Path) -> Path:
        """Write :meth:`to_json` to ``path`` atomically (a temporary file, then a rename)."""
        target = Path(path)
        scratch = target.with_name(target.name + ".partial")
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            scratch.write_text(self.to_json() + "\n", encoding="utf-8")
            scratch.replace(target)
        except OSError as exc:
            raise GapgaugeError(
                f"{target}: cannot write the {self.kind} JSON ({exc.strerror}); check the folder"
            ) from None
        return target
