"""Units that hardware logs may declare, with exact factors to SI.

Each unit belongs to one dimension; a channel accepts only units of its own dimension
(see :data:`gapgauge.trajectory.CHANNELS`). Factors are exact by definition (deg = pi/180 rad,
mm = 1e-3 m, ms = 1e-3 s, kN = 1e3 N,
kgf = 9.80665 N).
"""

from __future__ import annotations

import math

#: standard acceleration of gravity, m/s^2, exact by definition (3rd CGPM, 1901; SI brochure, 9th ed.,
#: appendix 1): one kilogram-force is 9.80665 N
STANDARD_GRAVITY = 9.80665

#: unit name -> (dimension, factor to SI)
UNITS: dict[str, tuple[str, float]] = {
    "s": ("time", 1.0),
    "ms": ("time", 1e-3),
    "us": ("time", 1e-6),
    "rad": ("angle", 1.0),
    "deg": ("angle", math.pi / 180.0),
    "rad/s": ("angular_rate", 1.0),
    "deg/s": ("angular_rate", math.pi / 180.0),
    "N m": ("torque", 1.0),
    "N mm": ("torque", 1e-3),
    "N": ("force", 1.0),
    "kN": ("force", 1e3),
    "kgf": ("force", STANDARD_GRAVITY),
    "m": ("length", 1.0),
    "mm": ("length", 1e-3),
    "cm": ("length", 1e-2),
    "m/s": ("speed", 1.0),
    "mm/s": ("speed", 1e-3),
}


def factor(unit: str, dimension: str) -> float:
    """Factor that converts ``unit`` to SI, checking it measures ``dimension``.

    Raises ``KeyError`` for an unknown unit and ``ValueError`` for a unit of another dimension;
    callers turn these into located user errors.
    """
    dim, scale = UNITS[unit]
    if dim != dimension:
        raise ValueError(f"unit {unit!r} measures {dim}, expected {dimension}")
    return scale


def units_for(dimension: str) -> list[str]:
    """Unit names accepted for ``dimension`` (for error messages)."""
    return [name for name, (dim, _) in UNITS.items() if dim == dimension]
