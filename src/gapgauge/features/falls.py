"""The fall and recovery rules: did the body go down, how long until it settled, did the trial succeed."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from ..scenario import Scenario
from .base import rows_with_nan

#: N: a contact force on a non-foot segment above this counts as a fall. Small, but above the
#: numerical chatter of a resting contact.
BODY_CONTACT_FORCE = 1.0


def fell(
    com_z: np.ndarray,
    trunk_pitch: np.ndarray,
    fall_com_height: float,
    fall_trunk_pitch: float,
    body_contact: np.ndarray | None = None,
    contact_force: float = BODY_CONTACT_FORCE,
) -> np.ndarray:
    """Fall indicator (1): 1.0 if at any sample the body is down, else 0.0.

    Down means ``com_z < fall_com_height``, or ``|trunk_pitch| > fall_trunk_pitch``, or (when the
    channel exists, i.e. in simulation) ``body_contact > contact_force``: a segment other than the
    foot touches the ground (DESIGN.md section 5: non-foot contact or centre of mass below a height).

    Args:
        com_z: centre-of-mass height above the support surface, ``(nbatch x nstep)`` m.
        trunk_pitch: trunk pitch from vertical, ``(nbatch x nstep)`` rad.
        fall_com_height: m. fall_trunk_pitch: rad.
        body_contact: contact force on non-foot segments, ``(nbatch x nstep)`` N, or None.
        contact_force: N, threshold on ``body_contact``.

    Returns:
        ``(nbatch,)`` float, 0.0 or 1.0; NaN for rows with NaN input.
    """
    # Extremes over time decide each test (no temporary arrays), and they are NaN exactly for rows
    # holding a NaN, which the sum below carries into the result.
    lowest = np.min(com_z, axis=1)
    pitch_max, pitch_min = np.max(trunk_pitch, axis=1), np.min(trunk_pitch, axis=1)
    down = (lowest < fall_com_height) | (pitch_max > fall_trunk_pitch) | (pitch_min < -fall_trunk_pitch)
    nan_probe = lowest + pitch_max
    if body_contact is not None:
        contact_max = np.max(body_contact, axis=1)
        down |= contact_max > contact_force
        nan_probe += contact_max
    return down + 0.0 * nan_probe


def recovery_time(t: np.ndarray, com_vx: np.ndarray, recovery_speed: float) -> np.ndarray:
    """Recovery time (s): from the first sample to the last sample at which ``|com_vx|`` exceeds
    ``recovery_speed``; after it the speed stays at or below the threshold to the end.

    Conventions: 0 if the speed never exceeds the threshold; if it still exceeds it at the last
    sample (never settles), the result is the whole window duration ``t[-1] - t[0]``. The time is
    that of the last exceeding sample itself (resolution one sample interval).

    Args:
        t: window times, ``(nstep,)`` s (starts at the disturbance onset).
        com_vx: horizontal centre-of-mass velocity, ``(nbatch x nstep)`` m/s.
        recovery_speed: m/s.

    Returns:
        ``(nbatch,)`` s; NaN for rows with NaN input.
    """
    exceed = (com_vx > recovery_speed) | (com_vx < -recovery_speed)  # boolean temporaries only
    nstep = exceed.shape[1]
    last = nstep - 1 - np.argmax(exceed[:, ::-1], axis=1)
    out = np.where(exceed.any(axis=1), t[last] - t[0], 0.0)
    out[rows_with_nan(com_vx)] = np.nan
    return out


def success(features: Mapping[str, np.ndarray], scenario: Scenario) -> np.ndarray:
    """Which trials succeeded: did not fall and every ``scenario.success_max`` bound holds
    (``feature <= bound``). A NaN feature (diverged row) is not a success.

    Args:
        features: feature name -> ``(nbatch,)``, as from :func:`compute_features`.
        scenario: gives ``success_max`` (feature name -> upper bound, in the feature's unit).

    Returns:
        ``(nbatch,)`` bool.

    Raises:
        KeyError: ``fell`` or a bounded feature is not in ``features``.
    """
    for name in ("fell", *scenario.success_max):
        if name not in features:
            raise KeyError(
                f"success needs feature {name!r}, which was not computed; add it to [features].names"
            )
    ok = np.asarray(features["fell"], dtype=float) == 0.0
    with np.errstate(invalid="ignore"):
        for name, bound in scenario.success_max.items():
            ok &= np.asarray(features[name], dtype=float) <= bound
    return ok
