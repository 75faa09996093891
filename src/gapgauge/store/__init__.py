"""store: the SQLite store (:class:`Store`), its schema and migrations; log readers and ingestion."""

from .db import RunRecord, Store
from .schema import SCHEMA_VERSION

__all__ = ["SCHEMA_VERSION", "RunRecord", "Store"]
