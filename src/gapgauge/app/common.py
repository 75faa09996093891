"""What every job of the application layer shares: a scenario from a path or an object, the store
opened once as a context manager."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..errors import StoreError
from ..scenario import Scenario, load_scenario
from ..store import Store


def as_scenario(scenario: Scenario | str | Path) -> Scenario:
    """``scenario`` itself, or the scenario loaded (and validated) from that path."""
    return scenario if isinstance(scenario, Scenario) else load_scenario(scenario)


@contextmanager
def open_store(store: Store | str | Path, *, must_exist: bool = True) -> Iterator[Store]:
    """Yield a :class:`Store`: ``store`` itself (left open for its owner), or the file at that path,
    opened here and closed on the way out.

    Raises:
        StoreError: ``must_exist`` and there is no file at the path.
    """
    if isinstance(store, Store):
        yield store
        return
    path = Path(store)
    if must_exist and not path.is_file():
        raise StoreError(f"{path}: store not found; run a sweep into it first (or give the right store path)")
    opened = Store(path)
    try:
        yield opened
    finally:
        opened.close()
