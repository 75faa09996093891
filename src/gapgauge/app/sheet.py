"""The run-sheet job: the stored proposals of a scenario and its last trial read from the store once, the
run sheet rendered (:func:`gapgauge.report.sheet.render_sheet`) and written as HTML (print it: one A4
page for up to five trials) or CSV, by the file's suffix."""

from __future__ import annotations

from pathlib import Path

from ..compare.propose import Proposals
from ..errors import StoreError
from ..report.inputs import relative
from ..report.sheet import RunSheet, render_sheet
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store

SUFFIXES = (".html", ".htm", ".csv")


def check_sheet_path(path: str | Path) -> Path:
    """``path`` as a Path when it ends in .html, .htm or .csv (checked before any work is done).

    Raises:
        StoreError: another suffix.
    """
    out = Path(path)
    if out.suffix.lower() not in SUFFIXES:
        raise StoreError(f"{out}: the run sheet is an HTML or CSV file; give a path ending in .html or .csv")
    return out


def write_run_sheet(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    path: str | Path,
    *,
    proposals: Proposals | None = None,
) -> Path:
    """Write the run sheet of ``proposals`` (default: the stored ones) to ``path`` (.html or .csv).

    Args:
        scenario: a Scenario or the path of its TOML.
        store: an open :class:`~gapgauge.store.Store` (left open) or the path of its file.
        path: the file to write; its suffix chooses HTML (``.html``, ``.htm``) or CSV (``.csv``).
        proposals: the proposals to print; None reads the newest stored for the scenario.

    Raises:
        StoreError: a suffix other than .html or .csv, no proposals stored, or the file cannot be written.
    """
    out = check_sheet_path(path)
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        if proposals is None:
            proposals = opened.load_result(Proposals, scenario.content_hash)
        trials = opened.trials(scenario.content_hash)
        store_path = relative(opened.path)
    if proposals is None or not proposals.proposals:
        raise StoreError(f"{store_path}: no proposals stored for scenario {scenario.name!r}; run propose first")
    sheet: RunSheet = render_sheet(scenario, proposals, trials[-1] if trials else None,
                                   first_number=len(trials) + 1, store_path=store_path)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(sheet.csv if out.suffix.lower() == ".csv" else sheet.html, encoding="utf-8")
    except OSError as exc:
        raise StoreError(
            f"{exc.filename or out}: cannot write the run sheet ({exc.strerror}); check the folder is writable"
        ) from None
    return out


__all__ = ["check_sheet_path", "write_run_sheet"]
