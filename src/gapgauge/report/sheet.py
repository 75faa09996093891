"""The run sheet: the proposed trials as a lab prints them, one A4 page for up to five trials, and the
same as CSV for a lab's own log.

Per trial (a column): each parameter in its declared unit with its change from the trial before (the
first proposal against the last trial in the store), the modelled fall risk, the checklist of the
caution (:data:`gapgauge.safety.CHECKLIST`) to tick, and blanks for the operator's outcome and notes.
Pure: handed the scenario, the proposals and the last trial; returns text (``gapgauge.app.sheet``
writes it).
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
from dataclasses import dataclass
from typing import Any

import jinja2

from ..compare.propose import Proposals
from ..quantities import format_number, format_percent
from ..records import TrialRecord
from ..safety import CAUTION_BODY, CHECKLIST
from ..scenario import Scenario
from ..version import __version__
from .sections.proposals import stop_text

TRIALS_PER_PAGE = 5
OUTCOMES = ("stood", "fell", "aborted")
CSV_DIGITS = 6  # the CSV is read by programs: enough digits to type the proposal back exactly enough

ENVIRONMENT = jinja2.Environment(
    loader=jinja2.PackageLoader("gapgauge.report", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)


@dataclass(frozen=True)
class RunSheet:
    """The run sheet as an HTML page (print it) and as CSV text (one row per trial)."""

    html: str
    csv: str


def _unit(unit: str) -> str:
    return "" if unit in ("", "1") else unit


def _changes(scenario: Scenario, proposals: Proposals, last: TrialRecord | None) -> list[list[float | None]]:
    """Per trial, per parameter: its value minus the previous trial's (None when there is no previous)."""
    previous = None if last is None else last.params
    out = []
    for p in proposals.proposals:
        row = []
        for name in scenario.parameter_names:
            before = None if previous is None else previous.get(name)
            row.append(None if before is None else float(p.params[name]) - float(before))
        out.append(row)
        previous = p.params
    return out


def _change_text(change: float | None) -> str:
    if change is None:
        return "new"
    if change == 0.0 or abs(change) < 1e-12:
        return "no change"
    return format_number(change, signed=True)


def sheet_context(scenario: Scenario, proposals: Proposals, last: TrialRecord | None, *, first_number: int,
                  store_path: str, generated_at: str) -> dict[str, Any]:
    """What the sheet's template shows (also the CSV's content)."""
    changes = _changes(scenario, proposals, last)
    trials = [
        {"proposal": i, "number": first_number + i - 1, "fall_risk": format_percent(p.fall_risk),
         "predicted": format_number(p.predicted_objective), "sd": format_number(p.predicted_sd)}
        for i, p in enumerate(proposals.proposals, start=1)
    ]
    rows = []
    for j, param in enumerate(scenario.parameters):
        unit = proposals.units.get(param.name, param.unit)
        rows.append({
            "name": param.name,
            "unit": _unit(unit),
            "safe": f"{format_number(param.safe_low)} to {format_number(param.safe_high)}",
            "cells": [
                {"value": format_number(p.params[param.name]), "change": _change_text(changes[i][j])}
                for i, p in enumerate(proposals.proposals)
            ],
        })
    pages = [
        {
            "trials": trials[start:start + TRIALS_PER_PAGE],
            "rows": [{**row, "cells": row["cells"][start:start + TRIALS_PER_PAGE]} for row in rows],
        }
        for start in range(0, max(len(trials), 1), TRIALS_PER_PAGE)
    ]
    return {
        "pages": pages,
        "scenario": scenario.name,
        "description": scenario.description,
        "store": store_path,
        "generated_at": generated_at,
        "tool_version": __version__,
        "trials": trials,
        "rows": rows,
        "checklist": list(CHECKLIST),
        "outcomes": list(OUTCOMES),
        "caution": CAUTION_BODY,
        "limit": format_percent(proposals.max_fall_risk),
        "seed": proposals.seed,
        "stop": stop_text(proposals),
        "last": None if last is None else {"file": last.source_path, "recorded_at": last.recorded_at},
        "compact": len(rows) > 16,
    }


def _csv(scenario: Scenario, proposals: Proposals, context: dict[str, Any], last: TrialRecord | None) -> str:
    changes = _changes(scenario, proposals, last)
    header = ["proposal", "trial"]
    for row in context["rows"]:
        header.append(f"{row['name']} [{row['unit']}]" if row["unit"] else row["name"])
    for row in context["rows"]:
        header.append(f"change {row['name']} [{row['unit']}]" if row["unit"] else f"change {row['name']}")
    header += ["modelled fall risk", "predicted objective", "predicted sd", *CHECKLIST, "outcome", "notes"]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for i, (p, trial) in enumerate(zip(proposals.proposals, context["trials"], strict=True)):
        values = [f"{float(p.params[n]):.{CSV_DIGITS}g}" for n in scenario.parameter_names]
        deltas = ["" if c is None else f"{c:.{CSV_DIGITS}g}" for c in changes[i]]
        writer.writerow([trial["proposal"], trial["number"], *values, *deltas, f"{p.fall_risk:.{CSV_DIGITS}g}",
                         f"{p.predicted_objective:.{CSV_DIGITS}g}", f"{p.predicted_sd:.{CSV_DIGITS}g}",
                         *([""] * len(CHECKLIST)), "", ""])
    return buffer.getvalue()


def render_sheet(
    scenario: Scenario,
    proposals: Proposals,
    last: TrialRecord | None = None,
    *,
    first_number: int = 1,
    store_path: str = "",
    generated_at: str | None = None,
) -> RunSheet:
    """The run sheet of ``proposals`` for ``scenario``.

    Args:
        scenario: the scenario (parameter order, units and safe bounds).
        proposals: the proposed trials (the stored result of ``gapgauge propose``).
        last: the last trial already run (the first proposal's change is against it), or None.
        first_number: the trial number the first proposal will get (trials so far + 1).
        store_path: the store the proposals came from (printed in the header).
        generated_at: when, ISO 8601 (default: now, UTC).
    """
    when = generated_at or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="minutes")
    context = sheet_context(scenario, proposals, last, first_number=first_number, store_path=store_path,
                            generated_at=when)
    html = ENVIRONMENT.get_template("sheet.html").render(**context)
    return RunSheet(html, _csv(scenario, proposals, context, last))
