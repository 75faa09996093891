"""Every number in the report's tables carries its unit where the quantity has one, in a unit that suits
its size, and reads back as the value the jobs computed.

The test reads the report's HTML tables with the standard library's ``html.parser``. What each quantity
measures comes from outside the code under test: the policy parameters' and physical quantities' units
from the scenario file itself (read with ``tomllib``), each feature's from its function's docstring in
``gapgauge.features`` (as stated in DEVELOPERS.md); the unit symbols and prefix factors from the SI
Brochure (BIPM, 9th edition, 2019, Table 7: milli 10^-3, micro 10^-6, kilo 10^3).
"""

from __future__ import annotations

import json
import math
import re
from html.parser import HTMLParser

import pytest

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

MU = "\u03bc"
#: unit symbol -> (dimension, factor to SI): SI Brochure Table 7 prefixes; deg = pi/180 rad (Table 8)
SYMBOLS = {
    "m": ("length", 1.0), "mm": ("length", 1e-3), MU + "m": ("length", 1e-6), "cm": ("length", 1e-2),
    "m\u00b2": ("area", 1.0), "mm\u00b2": ("area", 1e-6),
    "s": ("time", 1.0), "ms": ("time", 1e-3), MU + "s": ("time", 1e-6),
    "m/s": ("speed", 1.0), "mm/s": ("speed", 1e-3),
    "N": ("force", 1.0), "kN": ("force", 1e3), "N m": ("torque", 1.0),
    "J": ("energy", 1.0), "mJ": ("energy", 1e-3), "kJ": ("energy", 1e3),
    "rad": ("angle", 1.0), "deg": ("angle", math.pi / 180),
    "N m/rad": ("stiffness", 1.0), "N m s/rad": ("damping", 1.0),
}
#: what each feature measures, from the Returns line of its function (gapgauge.features)
FEATURE_DIMENSIONS = {
    "fell": None, "recovery_time": "time", "peak_com_excursion": "length", "cop_path_length": "length",
    "cop_mean_velocity": "speed", "cop_range": "length", "cop_rms_distance": "length", "sway_area": "area",
    "margin_of_stability": "length", "peak_joint_torque": "torque", "positive_work": "energy",
    # the 3-D body's medio-lateral and planar variants
    "cop_path_length_ml": "length", "cop_path_length_2d": "length", "cop_mean_velocity_ml": "speed",
    "cop_mean_velocity_2d": "speed", "cop_range_ml": "length", "peak_com_excursion_ml": "length",
    "sway_area_2d": "area", "cop_rms_distance_ml": "length", "cop_rms_distance_2d": "length",
    "cop_mean_distance_2d": "length", "cop_sway_area": "area",
}
#: columns whose numbers are pure: ratios in simulated spreads, rank statistics, counts
PURE_COLUMNS = re.compile(r"\bsd\b|Kendall|more trials|^#")
NUMBER = re.compile(r"^([+-]?[\d,]*\.?\d+)(?: \u00d7 10([\u207b\u2070-\u2079\u00b9\u00b2\u00b3]+))?(?:\s+(.+))?$")
SUPERSCRIPTS = str.maketrans("\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079", "-0123456789")


class Tables(HTMLParser):
    """Every table: its header texts and its rows, each row ``(tr attributes, [(tag, class, text)])``."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: list[dict] = []
        self._cell: list | None = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self.tables.append({"id": attrs.get("id"), "header": [], "rows": []})
        elif tag == "tr" and self.tables:
            self.tables[-1]["rows"].append((attrs, []))
        elif tag in ("td", "th") and self.tables and self.tables[-1]["rows"]:
            self._cell = [tag, attrs.get("class") or "", ""]
            self.tables[-1]["rows"][-1][1].append(self._cell)

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._cell = None
        if tag == "thead" and self.tables:
            first = self.tables[-1]["rows"]
            self.tables[-1]["header"] = [c[2].strip() for c in first[-1][1]] if first else []

    def handle_data(self, data):
        if self._cell is not None:
            self._cell[2] += data


def read_tables(text: str) -> list[dict]:
    parser = Tables()
    parser.feed(text)
    return parser.tables


def parse(text: str) -> tuple[float, str] | None:
    """``"-4.55 mm"`` -> (-4.55, "mm"); None when the text is not one number with an optional unit."""
    hit = NUMBER.match(" ".join(text.split()))
    if not hit:
        return None
    value = float(hit.group(1).replace(",", ""))
    if hit.group(2):
        value *= 10 ** int(hit.group(2).translate(SUPERSCRIPTS))
    return value, (hit.group(3) or "")


def header_unit(text: str) -> str | None:
    hit = re.search(r"\(([^()]+)\)\s*$", text)
    return hit.group(1) if hit and hit.group(1) in SYMBOLS else None


@pytest.fixture(scope="module")
def tables(report_lab):
    return read_tables(report_lab.html)


@pytest.fixture(scope="module")
def dimensions(report_lab):
    """Quantity name -> dimension: the features from their docstrings, parameters and physics from the TOML."""
    raw = tomllib.loads(report_lab.scenario.path.read_text(encoding="utf-8"))
    out = dict(FEATURE_DIMENSIONS)
    for p in raw["parameters"]:
        out[p["name"]] = SYMBOLS[p["unit"]][0] if p["unit"] in SYMBOLS else None
    for name, table in raw["physics"].items():
        out[name] = SYMBOLS[table["unit"]][0] if table["unit"] in SYMBOLS else None
    return out


def quantity_cells(tables: list[dict]):
    """``(table id, quantity, column header, row header, cell text)`` of every numeric cell of a row
    about one quantity (``<tr data-quantity>``)."""
    for table in tables:
        for attrs, cells in table["rows"]:
            quantity = attrs.get("data-quantity")
            if not quantity:
                continue
            for i, (_tag, cls, text) in enumerate(cells):
                if "num" in cls.split() and re.search(r"\d", text):
                    column = table["header"][i] if i < len(table["header"]) else ""
                    yield table["id"], quantity, column, cells[0][2].strip(), " ".join(text.split())


def test_the_report_has_tables_about_features_parameters_and_physics(tables):
    ids = {t["id"] for t in tables}
    assert {"shift-table", "calibration-table", "calibration-shift-table", "proposals-table"} <= ids
    assert sum(1 for _ in quantity_cells(tables)) > 100


def test_no_number_in_a_table_lacks_its_unit(tables, dimensions):
    missing = []
    for table, quantity, column, row_header, text in quantity_cells(tables):
        dimension = dimensions.get(quantity, "unknown")
        assert dimension != "unknown", f"{table}: {quantity} is neither a feature, a parameter nor a physics name"
        if dimension is None or PURE_COLUMNS.search(column):
            continue
        if text.startswith("["):  # an interval: "[low, high] unit"
            shown = text.rsplit("]", 1)[-1].strip()
        else:
            read = parse(text)
            assert read is not None, f"{table} / {quantity} / {column}: {text!r} is not a number with a unit"
            shown = read[1]
        unit = shown or header_unit(row_header) or header_unit(column)
        if unit not in SYMBOLS or SYMBOLS[unit][0] != dimension:
            missing.append(f"{table} / {quantity} / {column}: {text!r} (a {dimension})")
    assert missing == []


def test_no_table_shows_a_raw_float_dump(tables):
    dump = re.compile(r"(?<![\w.])[-+]?\d+(?:\.\d+)?[eE][-+]?\d+(?![\w.])")  # 2.25e-05, not a hash
    raw = [c[2] for t in tables for _, cells in t["rows"] for c in cells if dump.search(c[2])]
    assert raw == []


def read_back(text: str) -> float:
    value, unit = parse(text)
    return value * SYMBOLS[unit][1]


def test_the_shift_table_reads_back_as_the_shift_results(tables, report_lab):
    shift = report_lab.results["shift"]
    table = next(t for t in tables if t["id"] == "shift-table")
    bias_column = table["header"].index("bias")
    checked = 0
    for attrs, cells in table["rows"]:
        name = attrs.get("data-quantity")
        if not name or FEATURE_DIMENSIONS[name] is None:
            continue
        expected = shift.feature(name).bias
        shown = cells[bias_column][2].strip()
        # three significant figures: within half a unit of the third digit
        assert read_back(shown) == pytest.approx(expected, rel=5e-3, abs=1e-12), (name, shown)
        checked += 1
    assert checked >= 5


def test_the_calibration_table_reads_back_as_the_estimates(tables, report_lab):
    calibration = report_lab.results["calibration"]
    table = next(t for t in tables if t["id"] == "calibration-table")
    column = table["header"].index("estimate")
    rows = [(attrs, cells) for attrs, cells in table["rows"] if "data-quantity" in attrs]
    assert len(rows) == len(calibration.parameters)
    for attrs, cells in rows:
        estimate = calibration.estimate(attrs["data-quantity"]).estimate
        value, unit = parse(cells[column][2])
        factor = SYMBOLS[unit][1] if unit else 1.0
        assert value * factor == pytest.approx(estimate, rel=5e-3)


def test_the_proposals_table_reads_back_in_the_declared_units(tables, report_lab):
    proposals = report_lab.results["proposals"].proposals
    table = next(t for t in tables if t["id"] == "proposals-table")
    raw = tomllib.loads(report_lab.scenario.path.read_text(encoding="utf-8"))
    units = {p["name"]: p["unit"] for p in raw["parameters"]}
    for attrs, cells in table["rows"]:
        name = attrs.get("data-quantity")
        if not name:
            continue
        assert header_unit(cells[0][2]) == units[name] or units[name] in ("1", "")
        for proposal, cell in zip(proposals, cells[1:], strict=True):
            assert parse(cell[2])[0] == pytest.approx(proposal.params[name], rel=5e-3)


def test_the_json_summary_names_the_unit_of_every_feature_parameter_and_physics(report_lab):
    summary = json.loads(report_lab.report.json_path.read_text(encoding="utf-8"))
    raw = tomllib.loads(report_lab.scenario.path.read_text(encoding="utf-8"))
    units = summary["units"]
    assert {n: u["unit"] for n, u in units["parameters"].items()} == {p["name"]: p["unit"] for p in raw["parameters"]}
    assert {n: u["unit"] for n, u in units["physics"].items()} == {n: t["unit"] for n, t in raw["physics"].items()}
    si = {"length": "m", "area": "m^2", "time": "s", "speed": "m/s", "torque": "N m", "energy": "J", None: "1"}
    assert {n: u["unit"] for n, u in units["features"].items()} == {
        n: si[FEATURE_DIMENSIONS[n]] for n in units["features"]
    }
    first = summary["first_screen"]
    assert first["verdict"] == summary["verdict"] and first["budget"]["value"].endswith("trials")
