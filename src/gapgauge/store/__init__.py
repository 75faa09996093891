"""store: the SQLite store (:class:`Store`), its schema and migrations, its health check."""

from .db import Store
from .health import check_store
from .queries import RunRecord
from .schema import SCHEMA_VERSION

__all__ = ["SCHEMA_VERSION", "RunRecord", "Store", "check_store"]
