"""Unit sanity: each logged channel's scale against the matched simulation at the same parameters.

A declared unit that is wrong by a unit factor passes every per-sample check (radians declared as degrees
are merely small angles) and then shifts every feature. So once the matched simulations exist, each
channel's scale, the root mean square ``sqrt(mean(x^2))`` over the span both cover, is compared with the
nominal-physics matched simulation's (seen through the same logger view), over the standing phase and the
first :data:`RESPONSE_S` of the response: a unit mistake scales the whole record, while a trial that fell
where the simulation stood (or the other way) differs mostly later. A channel whose scale in the log is
within :data:`NOISE_SDS` sds of its own noise (a rate while standing still) cannot be judged and is skipped.
A ratio within a factor
:data:`UNIT_RATIO_TOLERANCE` of the factor between the declared unit and another unit of the same
dimension (180/pi for deg and rad, 1000 for mm and m, ms and s, N mm and N m, 9.80665 for kgf and N; the
factors are exact, SI brochure, 9th edition) refuses the file with the likely fix; any other ratio beyond
:data:`SCALE_FLAG_RATIO` either way is a flag on the channel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..trajectory import Trajectory, channel_dimension
from ..units import UNITS
from .align import noise_sd

#: a scale ratio within this factor of a unit factor is taken for that unit mistake
UNIT_RATIO_TOLERANCE = 1.6
#: a scale ratio beyond this factor (either way) that is no unit factor is flagged
SCALE_FLAG_RATIO = 4.0
#: unit factors smaller than this are not told apart from a robot that differs from its model
SMALLEST_UNIT_FACTOR = 5.0
#: seconds of the response after the onset that enter the comparison
RESPONSE_S = 0.3
#: the log's scale must exceed this many sds of its own noise for the channel to be judged
NOISE_SDS = 3.0


@dataclass
class UnitFinding:
    """One channel whose scale is far from the simulation's.

    ``ratio`` is the log's scale over the simulation's; ``likely_unit`` the unit the values seem to be in
    (None for a mismatch that no unit explains); ``refuse`` says whether the file is refused.
    """

    channel: str
    ratio: float
    declared: str
    likely_unit: str | None
    refuse: bool
    message: str


def scale(values: np.ndarray) -> float:
    """Root mean square of ``values (n,)`` about zero (an offset counts: 45 mm is 45 mm whatever moves)."""
    return float(np.sqrt(np.mean(np.square(values)))) if values.size else math.nan


def check_units(
    log: Trajectory, simulated: Trajectory, declared: dict[str, str], table: str, source: str
) -> list[UnitFinding]:
    """Compare each channel's scale in ``log`` with ``simulated`` (batch of one each, SI, scenario clock).

    Args:
        log: the trial's trajectory. simulated: the matched simulation (nominal physics, same parameters),
            through :func:`gapgauge.observe.logger_view`.
        declared: channel -> the unit the log declared. table: the scenario table that declares them
            (``[hardware.columns]`` or ``[hardware.bag]``). source: the log, for messages.
    """
    lo, hi = max(log.t[0], simulated.t[0]), min(log.t[-1], simulated.t[-1], log.onset + RESPONSE_S)
    window = (log.t >= lo) & (log.t <= hi)
    findings = []
    for channel, unit in declared.items():
        if channel not in log.channels or channel not in simulated.channels or unit not in UNITS:
            continue
        mine = log.channels[channel][0][window]
        theirs = np.interp(log.t[window], simulated.t, simulated.channels[channel][0])
        ours, sim = scale(mine), scale(theirs)
        if not (sim > 0 and math.isfinite(ours) and math.isfinite(sim)) or not ours > NOISE_SDS * noise_sd(mine):
            continue  # a scale of noise alone says nothing about the unit
        ratio = ours / sim
        likely = _likely_unit(channel, unit, ratio)
        if likely is not None:
            findings.append(UnitFinding(
                channel, ratio, unit, likely, True,
                f"{source}: {channel} looks like {likely}, declared {unit}: its scale is {ratio:.4g} times the "
                f"matched simulation's (the factor between {likely} and {unit} is "
                f"{_factor(unit, likely):.6g}); set unit = \"{likely}\" for {channel} in {table}",
            ))
        elif abs(math.log(ratio)) > math.log(SCALE_FLAG_RATIO):
            findings.append(UnitFinding(
                channel, ratio, unit, None, False,
                f"{channel}: scale {ratio:.3g} times the matched simulation's (no unit factor explains it); "
                f"check the sensor, its unit ({unit}) and the model",
            ))
    return findings


def _factor(declared: str, actual: str) -> float:
    """Declared SI over true SI when values in ``actual`` are declared as ``declared``."""
    return UNITS[declared][1] / UNITS[actual][1]


def _likely_unit(channel: str, declared: str, ratio: float) -> str | None:
    try:
        dim = channel_dimension(channel)
    except KeyError:
        return None
    best, best_distance = None, math.log(UNIT_RATIO_TOLERANCE)
    for other, (odim, _) in UNITS.items():
        if odim != dim or other == declared:
            continue
        expected = _factor(declared, other)
        if max(expected, 1 / expected) < SMALLEST_UNIT_FACTOR:
            continue
        distance = abs(math.log(ratio / expected))
        if distance < best_distance:
            best, best_distance = other, distance
    return best
