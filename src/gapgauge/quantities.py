"""Quantities as people read them: the unit of every feature, channel and parameter, and numbers shown
in a unit that suits their size with three significant figures.

Everything gapgauge computes is in SI (m, s, rad, N, N m, J, m^2). A table or a figure picks the
display unit per quantity (or per column, so that the numbers of a column compare): the largest unit
of the quantity's ladder in which the largest magnitude shown is at least 1 (0.0225 m -> 22.5 mm;
3.06e-5 m^2 -> 30.6 mm^2; 0.35 s -> 350 ms). Unit symbols and the prefixes' factors follow the SI
Brochure (BIPM, 9th edition, 2019): a space between the number and the unit, ``%`` included.

Units a scenario declares for its parameters (``N m/rad``, ``N m s/rad``, ``rad``, ``s``) are kept as
declared, so a value reads the same in the report, on the run sheet and in the robot's configuration.

Base layer: no gapgauge import but :mod:`gapgauge.trajectory` (the channels' dimensions).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from dataclasses import dataclass

from .trajectory import channel_dimension

DIGITS = 3
MICRO = "\u03bc"  # the SI Brochure's prefix symbol: the Greek letter mu

#: unit symbol (as stored or declared) -> (dimension, factor to SI). "1": a pure number.
UNIT_DIMENSIONS: dict[str, tuple[str, float]] = {
    "1": ("dimensionless", 1.0),
    "": ("dimensionless", 1.0),
    "m": ("length", 1.0),
    "cm": ("length", 1e-2),
    "mm": ("length", 1e-3),
    MICRO + "m": ("length", 1e-6),
    "m^2": ("area", 1.0),
    "m\u00b2": ("area", 1.0),
    "mm^2": ("area", 1e-6),
    "mm\u00b2": ("area", 1e-6),
    "s": ("time", 1.0),
    "ms": ("time", 1e-3),
    MICRO + "s": ("time", 1e-6),
    "us": ("time", 1e-6),
    "m/s": ("speed", 1.0),
    "mm/s": ("speed", 1e-3),
    "rad": ("angle", 1.0),
    "deg": ("angle", math.pi / 180.0),
    "rad/s": ("angular_rate", 1.0),
    "deg/s": ("angular_rate", math.pi / 180.0),
    "N": ("force", 1.0),
    "kN": ("force", 1e3),
    "N m": ("torque", 1.0),
    "N mm": ("torque", 1e-3),
    "J": ("energy", 1.0),
    "mJ": ("energy", 1e-3),
    "kJ": ("energy", 1e3),
    "kg": ("mass", 1.0),
    "g": ("mass", 1e-3),
}

#: dimension -> display units, largest first: (symbol, factor to SI)
LADDERS: dict[str, tuple[tuple[str, float], ...]] = {
    "length": (("m", 1.0), ("mm", 1e-3), (MICRO + "m", 1e-6)),
    "area": (("m\u00b2", 1.0), ("mm\u00b2", 1e-6)),
    "time": (("s", 1.0), ("ms", 1e-3), (MICRO + "s", 1e-6)),
    "speed": (("m/s", 1.0), ("mm/s", 1e-3)),
    "force": (("kN", 1e3), ("N", 1.0)),
    "torque": (("N m", 1.0),),
    "energy": (("kJ", 1e3), ("J", 1.0), ("mJ", 1e-3)),
    "mass": (("kg", 1.0), ("g", 1e-3)),
    "angle": (("rad", 1.0),),
    "angular_rate": (("rad/s", 1.0),),
}
#: the ladders a figure uses for angles: degrees read better on an axis than radians
DEGREE_LADDERS = {"angle": (("deg", math.pi / 180.0),), "angular_rate": (("deg/s", math.pi / 180.0),)}
SI_UNIT = {"length": "m", "area": "m^2", "time": "s", "speed": "m/s", "force": "N", "torque": "N m",
           "energy": "J", "mass": "kg", "angle": "rad", "angular_rate": "rad/s", "dimensionless": "1"}

#: feature -> (SI unit, label). Units from each feature function's docstring (gapgauge.features).
FEATURES: dict[str, tuple[str, str]] = {
    "fell": ("1", "fell"),
    "recovery_time": ("s", "recovery time"),
    "peak_com_excursion": ("m", "peak COM excursion"),
    "cop_path_length": ("m", "COP path length"),
    "cop_mean_velocity": ("m/s", "COP mean velocity"),
    "cop_range": ("m", "COP range"),
    "cop_rms_distance": ("m", "COP rms distance"),
    "sway_area": ("m^2", "sway area"),
    "margin_of_stability": ("m", "margin of stability"),
    "peak_joint_torque": ("N m", "peak joint torque"),
    "positive_work": ("J", "positive work"),
    "cop_mean_distance_2d": ("m", "COP mean distance (2-D)"),
    "cop_sway_area": ("m^2", "COP sway area"),
}
#: a feature's variant of a 3-D body: name ending -> words added to its label (same unit as the feature)
FEATURE_VARIANTS = {"_ml": "medio-lateral", "_2d": "2-D"}
#: a channel name's ending -> dimension, for channels named per joint or body (``<joint>_angle``)
CHANNEL_SUFFIXES: tuple[tuple[str, str], ...] = (
    ("_angle", "angle"), ("_rate", "angular_rate"), ("_torque", "torque"), ("_force", "force"),
    ("_pitch", "angle"), ("_vx", "speed"), ("_vz", "speed"), ("_x", "length"), ("_z", "length"),
)
#: words a label spells in the trade's abbreviations
_ABBREVIATIONS = {"com": "COM", "cop": "COP", "vx": "vx", "vz": "vz"}


@dataclass(frozen=True)
class DisplayUnit:
    """A unit to show numbers in: its symbol ("" for a pure number) and its factor to SI."""

    symbol: str
    factor: float

    def __call__(self, si_value: float) -> float:
        """``si_value`` expressed in this unit."""
        return si_value / self.factor


def dimension(unit: str | None) -> str | None:
    """The dimension of a unit symbol (``"length"``, ``"time"``, ...), None when unknown."""
    if unit is None:
        return None
    hit = UNIT_DIMENSIONS.get(unit.strip())
    return None if hit is None else hit[0]


def to_si(value: float, unit: str | None) -> float:
    """``value`` in ``unit`` converted to SI (unchanged for an unknown or compound unit)."""
    hit = UNIT_DIMENSIONS.get((unit or "").strip())
    return value if hit is None else value * hit[1]


def _feature(name: str) -> tuple[str, str] | None:
    """``(unit, label)`` of a feature or of its medio-lateral / 2-D variant (``cop_range_ml``)."""
    if name in FEATURES:
        return FEATURES[name]
    for ending, words in FEATURE_VARIANTS.items():
        base = name[: -len(ending)] if name.endswith(ending) else None
        if base in FEATURES:
            unit, text = FEATURES[base]
            return unit, f"{text} ({words})"
    return None


def feature_unit(name: str) -> str | None:
    """The SI unit of a feature, None when gapgauge does not know the feature."""
    hit = _feature(name)
    return None if hit is None else hit[0]


def channel_unit(name: str) -> str | None:
    """The SI unit of a trajectory channel: its dimension from :func:`gapgauge.trajectory.channel_dimension`
    (body channels, ``<joint>_angle / _rate / _torque``, ``<group>_force / _x``), else from the name's
    ending; None when neither knows it."""
    try:
        return SI_UNIT.get(channel_dimension(name))
    except KeyError:
        pass
    for suffix, dim in CHANNEL_SUFFIXES:
        if name.endswith(suffix):
            return SI_UNIT[dim]
    return None


def label(name: str) -> str:
    """A feature's or channel's name in words: ``peak_com_excursion`` -> ``peak COM excursion``."""
    hit = _feature(name)
    if hit is not None:
        return hit[1]
    return " ".join(_ABBREVIATIONS.get(w, w) for w in name.split("_"))


def _ladder(unit: str | None, degrees: bool) -> tuple[tuple[str, float], ...] | None:
    dim = dimension(unit)
    if dim is None or dim == "dimensionless":
        return None
    if degrees and dim in DEGREE_LADDERS:
        return DEGREE_LADDERS[dim]
    return LADDERS.get(dim)


def display_unit(unit: str | None, values: Iterable[float] = (), *, degrees: bool = False,
                 keep: bool = False) -> DisplayUnit:
    """The unit to show ``values`` (given in ``unit``) in.

    The largest unit of the dimension's ladder in which the largest finite magnitude, rounded to
    three significant figures, is at least 1; the smallest when every value is below that; the SI unit
    when there is no finite non-zero value. ``keep``: the unit as declared (parameters). ``degrees``:
    angles and angular rates in deg and deg/s. An unknown or compound unit (``N m/rad``) is kept.
    """
    declared = (unit or "").strip()
    ladder = None if keep else _ladder(declared, degrees)
    if ladder is None:
        symbol = "" if declared in ("", "1") else declared.replace("^2", "\u00b2")
        return DisplayUnit(symbol, 1.0 if keep or declared not in UNIT_DIMENSIONS else UNIT_DIMENSIONS[declared][1])
    si = [abs(to_si(float(v), declared)) for v in values if v is not None and math.isfinite(float(v))]
    largest = max((v for v in si if v > 0), default=None)
    if largest is None:
        base = next((u for u in ladder if u[1] == 1.0), ladder[0])
        return DisplayUnit(*base)
    for symbol, factor in ladder:
        if float(f"{largest / factor:.{DIGITS}g}") >= 1.0:
            return DisplayUnit(symbol, factor)
    return DisplayUnit(*ladder[-1])


_SUPERSCRIPT = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")


def format_number(value: float | None, digits: int = DIGITS, *, signed: bool = False) -> str:
    """``value`` to ``digits`` significant figures, trailing zeros kept (0.0800), thousands separated
    (1,230), powers of ten below 10^-4 (2.25 x 10^-5 written with a superscript); "–" for a missing or
    non-finite value; an integer (a count) in full. ``signed``: a "+" before positive values (changes)."""
    if value is None or isinstance(value, bool):
        return "\u2013"
    if isinstance(value, numbers.Integral):
        return ("+" if signed and value > 0 else "") + f"{int(value):,}"
    x = float(value)
    if not math.isfinite(x):
        return "\u2013"
    sign = "+" if signed and x > 0 else ""
    if x == 0.0:
        return "0"
    exponent = math.floor(math.log10(abs(float(f"{x:.{digits - 1}e}"))))
    if exponent < -4:
        mantissa, power = f"{x:.{digits - 1}e}".split("e")
        return f"{sign}{mantissa} \u00d7 10{str(int(power)).translate(_SUPERSCRIPT)}"
    if exponent >= digits - 1:
        rounded = round(x, -(exponent - digits + 1))
        return f"{sign}{int(rounded):,}"
    return f"{sign}{x:.{digits - 1 - exponent}f}"


def format_count(value: int | None) -> str:
    """A count with thousands separated; "–" when missing."""
    return "\u2013" if value is None else f"{int(value):,}"


def format_quantity(value: float | None, unit: str | None, *, display: DisplayUnit | None = None,
                    digits: int = DIGITS, signed: bool = False, keep: bool = False,
                    degrees: bool = False) -> str:
    """``value`` (in ``unit``) as text with its display unit: ``0.0225, "m"`` -> ``"22.5 mm"``.

    ``display``: a unit chosen for a whole column (:func:`display_unit`); by default chosen for this
    value alone. ``keep``: show in ``unit`` as declared. A pure number gets no unit.
    """
    if value is None or not math.isfinite(float(value)):
        return "\u2013"
    shown = display or display_unit(unit, (value,), keep=keep, degrees=degrees)
    number = format_number(shown(to_si(float(value), unit)) if not keep else float(value), digits, signed=signed)
    return f"{number} {shown.symbol}" if shown.symbol else number


def format_interval(interval: Iterable[float] | None, unit: str | None, *, display: DisplayUnit | None = None,
                    digits: int = DIGITS, keep: bool = False) -> str:
    """``(low, high)`` in one unit: ``[-20.0, 60.0] μm``; "–" when an end is missing."""
    ends = list(interval) if interval is not None else []
    if len(ends) != 2 or any(e is None or not math.isfinite(float(e)) for e in ends):
        return "\u2013"
    shown = display or display_unit(unit, ends, keep=keep)
    low, high = ((float(e) if keep else shown(to_si(float(e), unit))) for e in ends)
    text = f"[{format_number(low, digits)}, {format_number(high, digits)}]"
    return f"{text} {shown.symbol}" if shown.symbol else text


def format_percent(probability: float | None, digits: int = DIGITS) -> str:
    """A probability as a percentage: ``0.0343`` -> ``"3.43 %"`` (SI Brochure: a space before %)."""
    if probability is None or not math.isfinite(float(probability)):
        return "\u2013"
    return f"{format_number(100.0 * float(probability), digits)} %"


def with_unit(name: str, unit: DisplayUnit | str | None) -> str:
    """An axis or column label: ``"peak COM excursion (mm)"``; the name alone for a pure number."""
    symbol = unit.symbol if isinstance(unit, DisplayUnit) else display_unit(unit).symbol
    return f"{name} ({symbol})" if symbol else name
