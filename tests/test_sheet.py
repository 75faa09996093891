"""The run sheet of ``gapgauge propose --sheet``: per trial the parameters in their declared units, the
change from the trial before, the modelled fall risk, the caution's checklist and blanks for the operator.

Outside checks: the parameters' units come from the scenario file (``tomllib``); the changes are
recomputed here by subtraction from the proposals and the last stored trial; the CSV is read back with
the standard library's ``csv`` module; the checklist holds the precautions DESIGN.md section 7 names
(a harness or spotter, torque and speed limits, an emergency stop). That the page prints on one A4 sheet
is checked in a real browser (test_browser.py).
"""

from __future__ import annotations

import csv
import io
import sqlite3

import pytest
from click.testing import CliRunner

from gapgauge.app.prior import load_prior
from gapgauge.app.sheet import write_run_sheet
from gapgauge.cli import main
from gapgauge.compare.propose import propose
from gapgauge.errors import StoreError
from gapgauge.report.sheet import TRIALS_PER_PAGE, render_sheet
from gapgauge.store import Store
from test_report_units import parse, read_tables

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

PRECAUTIONS = ("harness or spotter", "torque and speed limits", "emergency stop")


@pytest.fixture(scope="module")
def five(report_lab):
    """Five proposals from the shared store's prior (made here, not stored: the store stays as it is)."""
    prior = load_prior(report_lab.scenario, report_lab.store)
    return propose(report_lab.scenario, prior, count=5, seed=3)


@pytest.fixture(scope="module")
def last_trial(report_lab):
    return report_lab.store.trials(report_lab.scenario.content_hash)[-1]


@pytest.fixture(scope="module")
def sheet(report_lab, five, last_trial):
    return render_sheet(report_lab.scenario, five, last_trial, first_number=6, store_path="lab.sqlite")


def units_of(scenario) -> dict[str, str]:
    raw = tomllib.loads(scenario.path.read_text(encoding="utf-8"))
    return {p["name"]: p["unit"] for p in raw["parameters"]}


def test_each_parameter_is_shown_in_its_declared_unit_with_the_change_from_the_trial_before(
    report_lab, five, last_trial, sheet
):
    table = read_tables(sheet.html)[0]
    units = units_of(report_lab.scenario)
    rows = {attrs["data-quantity"]: cells for attrs, cells in table["rows"] if "data-quantity" in attrs}
    assert list(rows) == report_lab.scenario.parameter_names
    for name, cells in rows.items():
        assert cells[1][2].strip() == ("" if units[name] == "1" else units[name])
        previous = last_trial.params[name]
        for proposal, cell in zip(five.proposals, cells[2:], strict=True):
            value = proposal.params[name]
            shown, change = cell[2].split(maxsplit=1) if " " in cell[2].strip() else (cell[2], "")
            assert parse(shown)[0] == pytest.approx(value, rel=5e-3, abs=1e-12), (name, cell[2])
            delta = value - previous
            if abs(delta) < 1e-12:
                assert "no change" in change
            else:
                assert parse(change.strip())[0] == pytest.approx(delta, rel=5e-3, abs=1e-9), (name, change)
            previous = value
    header = table["header"]
    assert header[2:] == [f"#{i} \u00b7 trial {5 + i}" for i in range(1, 6)]


def test_the_sheet_carries_the_fall_risk_the_checklist_and_blanks_for_the_operator(five, sheet):
    table = read_tables(sheet.html)[0]
    labels = [cells[0][2].strip() for _, cells in table["rows"]]
    risk = next(cells for _, cells in table["rows"] if cells[0][2].strip() == "modelled fall risk")
    for proposal, cell in zip(five.proposals, risk[2:], strict=True):
        value, unit = parse(cell[2])
        assert unit == "%" and value / 100 == pytest.approx(proposal.fall_risk, rel=5e-3)
    for precaution in PRECAUTIONS:
        assert any(precaution in text for text in labels), precaution
    for blank in ("outcome", "operator, time", "notes"):
        row = next(cells for _, cells in table["rows"] if cells[0][2].strip() == blank)
        assert len(row) == 1 + len(five.proposals)
        assert all(" ".join(c[2].split()) in ("", "stood fell aborted") for c in row[1:]), blank
    assert "CAUTION" in sheet.html


def test_the_csv_reads_back_as_the_proposals(report_lab, five, last_trial, sheet):
    rows = list(csv.DictReader(io.StringIO(sheet.csv)))
    units = units_of(report_lab.scenario)
    assert [int(r["trial"]) for r in rows] == [6, 7, 8, 9, 10]
    for row, proposal in zip(rows, five.proposals, strict=True):
        for name in report_lab.scenario.parameter_names:
            column = name if units[name] == "1" else f"{name} [{units[name]}]"
            assert float(row[column]) == pytest.approx(proposal.params[name], rel=1e-5)
        assert float(row["modelled fall risk"]) == pytest.approx(proposal.fall_risk, rel=1e-5)
        assert row["outcome"] == "" and row["notes"] == ""
    first = report_lab.scenario.parameter_names[0]
    column = f"change {first} [{units[first]}]"
    assert float(rows[0][column]) == pytest.approx(five.proposals[0].params[first] - last_trial.params[first],
                                                   rel=1e-5, abs=1e-9)


def test_more_than_five_trials_take_one_page_per_five(report_lab, five, last_trial):
    seven = type(five)(**{**five.__dict__, "proposals": five.proposals + five.proposals[:2]})
    html = render_sheet(report_lab.scenario, seven, last_trial).html
    assert html.count('<div class="page">') == -(-7 // TRIALS_PER_PAGE) == 2


def test_a_sheet_without_a_store_trial_says_every_value_is_new(report_lab, five):
    html = render_sheet(report_lab.scenario, five, None).html
    assert "new" in html and "no trial in the store yet" in html


def test_the_sheet_is_refused_for_another_suffix_and_without_proposals(report_lab, tmp_path):
    with pytest.raises(StoreError, match="ending in .html or .csv"):
        write_run_sheet(report_lab.scenario, report_lab.store, tmp_path / "sheet.pdf")
    with Store(tmp_path / "empty.sqlite") as empty:
        with pytest.raises(StoreError, match="no proposals stored"):
            write_run_sheet(report_lab.scenario, empty, tmp_path / "sheet.html")
    assert not (tmp_path / "sheet.html").exists()


def test_propose_writes_the_run_sheet_beside_its_table(report_lab, tmp_path):
    copy = tmp_path / "copy.sqlite"  # the shared store stays as it is: propose saves its result
    with sqlite3.connect(report_lab.store.path) as source, sqlite3.connect(copy) as target:
        source.backup(target)
    out = tmp_path / "sheets" / "next.csv"
    ran = CliRunner().invoke(main, ["propose", str(report_lab.scenario.path), "--store", str(copy), "--count", "2",
                                    "--sheet", str(out)])
    assert ran.exit_code == 0, ran.output
    assert "run sheet:" in ran.output and out.is_file()
    assert len(list(csv.DictReader(io.StringIO(out.read_text(encoding="utf-8"))))) == 2
    refused = CliRunner().invoke(main, ["propose", str(report_lab.scenario.path), "--store", str(copy),
                                        "--sheet", str(tmp_path / "sheet.txt")])
    assert refused.exit_code == 2 and "ending in .html or .csv" in refused.output
