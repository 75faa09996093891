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
def open_store(store: Store | str | Path, *, must_exist: bool = True,
               scenario: Scenario | None = None) -> Iterator[Store]:
    """Yield a :class:`Store`: ``store`` itself (left open for its owner), or the file at that path,
    opened here and closed on the way out. With ``scenario``, its version is recorded first, so the
    runs and trials of every version that simulates the same (an edited hardware map, shift threshold,
    objective weight or description) are found under its hash (:mod:`gapgauge.scenario.identity`).

    Raises:
        StoreError: ``must_exist`` and there is no file at the path.
    """
    if isinstance(store, Store):
        if scenario is not None:
            store.add_scenario(scenario)
        yield store
        return
    path = Path(store)
    if must_exist and not path.is_file():
        raise StoreError(f"{path}: store not found; run a sweep into it first (or give the right store path)")
    opened = Store(path)
    try:
        if scenario is not None:
            opened.add_scenario(scenario)
        yield opened
    finally:
        opened.close()
