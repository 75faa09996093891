"""Units and numbers as people read them (gapgauge.quantities).

Outside checks: the SI Brochure (BIPM, 9th edition, 2019): prefix factors (section 3: milli = 10^-3,
micro = 10^-6, kilo = 10^3; a prefixed unit raised to a power raises the prefix too, so
1 mm^2 = 10^-6 m^2), the micro sign written as the Greek letter mu, and a space between a number and its
unit, the percent sign included (section 5.4.3 and 5.4.7); significant figures as Python's own ``"g"``
format rounds them; each feature's unit as its function's docstring states it (gapgauge.features), and
the channel units of DEVELOPERS.md ("Trajectory channels (SI)").
"""

from __future__ import annotations

import inspect
import math
import re

import pytest

from gapgauge import features
from gapgauge.quantities import (
    channel_unit,
    display_unit,
    feature_unit,
    format_interval,
    format_number,
    format_percent,
    format_quantity,
    label,
)
from gapgauge.scenario.types import ALL_FEATURE_NAMES

MU = "\u03bc"


def value_of(text: str) -> float:
    """A formatted number read back (thousands separators and the x 10^n form undone)."""
    text = text.replace(",", "").replace("\u2212", "-")
    if "\u00d7 10" in text:
        mantissa, power = text.split(" \u00d7 10")
        digits = power.translate(str.maketrans("\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079",
                                               "-0123456789"))
        return float(mantissa) * 10 ** int(digits)
    return float(text)


@pytest.mark.parametrize(
    ("value", "unit", "expected"),
    [
        (2.25e-5, "m", f"22.5 {MU}m"),  # the centre-of-mass bias: 10^-6 m is a micrometre
        (0.0059, "m", "5.90 mm"),  # 10^-3 m is a millimetre; the trailing zero is significant
        (3.06e-5, "m^2", "30.6 mm\u00b2"),  # 1 mm^2 = (10^-3 m)^2 = 10^-6 m^2
        (0.35, "s", "350 ms"),
        (1.2, "s", "1.20 s"),
        (1234.5, "N", "1.23 kN"),
        (8.94, "N m", "8.94 N m"),
        (2.37, "J", "2.37 J"),
        (0.047, "m/s", "47.0 mm/s"),
        (0.9996, "m", "1.00 m"),  # rounds up to 1.00 m, not "1,000 mm"
    ],
)
def test_a_value_is_shown_in_the_unit_that_suits_its_size(value, unit, expected):
    assert format_quantity(value, unit) == expected


def test_the_number_and_its_unit_are_separated_by_a_space_and_mu_is_greek():
    text = format_quantity(3.3e-6, "s")
    assert text == f"3.30 {MU}s" and ord(text.split(" ")[1][0]) == 0x3BC  # SI Brochure 5.4.3, Table 7
    assert format_percent(0.0343) == "3.43 %"  # SI Brochure 5.4.7: 25 %, with a space


@pytest.mark.parametrize("value", [0.012345, 1.0, 123.45, 999.5, 12345.6, -0.0004567, 6.02e-7, 87654321.0, 0.1])
def test_three_significant_figures_round_as_python_rounds_them(value):
    shown = format_number(value)
    assert value_of(shown) == pytest.approx(float(f"{value:.3g}"), rel=1e-12)
    significant = re.sub(r"^[-+]?0*\.?0*", "", shown.replace(",", "").split(" ")[0].replace(".", ""))
    if abs(value_of(shown)) < 1000:  # from 1000 up the integer digits are shown in full (1,230)
        assert len(significant) == 3, shown


def test_counts_are_whole_and_signs_are_explicit_when_asked():
    assert format_number(1500) == "1,500"
    assert format_number(0.5, signed=True) == "+0.500"
    assert format_number(-0.5, signed=True) == "-0.500"
    assert format_number(float("nan")) == "\u2013" and format_number(None) == "\u2013"


def test_a_column_shares_one_unit_chosen_by_its_largest_value():
    shown = display_unit("m", [0.0004, 0.02, -0.0061])
    assert shown.symbol == "mm" and shown.factor == 1e-3
    assert format_quantity(0.0004, "m", display=shown) == "0.400 mm"
    assert format_interval((-0.00455, 0.0163), "m") == "[-4.55, 16.3] mm"


def test_declared_parameter_units_are_kept_as_declared():
    assert format_quantity(1200.0, "N m/rad") == "1,200 N m/rad"
    assert format_quantity(0.1, "s", keep=True) == "0.100 s"
    assert format_quantity(0.05, "rad", keep=True) == "0.0500 rad"
    assert format_quantity(0.9, "1") == "0.900"  # a pure number carries no unit


def test_angles_on_a_figure_read_in_degrees():
    assert format_quantity(math.pi / 18, "rad", degrees=True) == "10.0 deg"


def documented_unit(name: str) -> str:
    """A feature's unit as its function's docstring states it: the ``Returns`` line (``(nbatch,)`` m), or
    the first bracket of the first line ("... in the plane (m/s): ..."); a ``_ml`` feature is its base
    function applied to the medio-lateral channel."""
    function = getattr(features, name, None) or getattr(features, name.removesuffix("_ml"))
    doc = inspect.getdoc(function)
    if "Returns:" in doc:
        returns = doc.split("Returns:", 1)[1].split("\n", 2)[1]
        return re.search(r"``\(nbatch,\)``\s+([^;]+);", returns).group(1).strip()
    return re.search(r"\(([^()]+)\)", doc.split("\n", 1)[0]).group(1)


def test_each_feature_unit_is_the_one_its_function_documents():
    for name in ALL_FEATURE_NAMES:
        if name == "fell":
            assert feature_unit(name) == "1"
            continue
        assert feature_unit(name) == documented_unit(name), name
    assert label("cop_range_ml") == "COP range (medio-lateral)" and label("sway_area_2d") == "sway area (2-D)"


def test_channel_units_are_those_of_the_trajectory_contract():
    # DEVELOPERS.md, "Trajectory channels (SI)"
    contract = {"ankle_angle": "rad", "knee_rate": "rad/s", "hip_torque": "N m", "heel_force": "N", "toe_x": "m",
                "cop_x": "m", "com_z": "m", "com_vx": "m/s", "trunk_pitch": "rad", "platform_x": "m"}
    assert {c: channel_unit(c) for c in contract} == contract
    # joints are named by the model, not by gapgauge: any <joint>_torque is a torque
    assert channel_unit("left_knee_torque") == "N m" and channel_unit("right_hip_angle") == "rad"


def test_labels_spell_the_trades_abbreviations():
    assert label("peak_com_excursion") == "peak COM excursion"
    assert label("cop_path_length") == "COP path length"
    assert feature_unit("sway_area") == "m^2" and feature_unit("not_a_feature") is None
