"""The trajectory front end: cut a :class:`~gapgauge.trajectory.Trajectory` to the window from the
disturbance onset, fetch each channel once per block of rows, and call the feature functions by name.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from ..scenario import FEATURE_NAMES, FeatureSettings
from ..trajectory import Trajectory
from .base import onset_index, rows_with_nan
from .effort import peak_joint_torque, positive_work
from .falls import fell, recovery_time
from .stability import margin_of_stability
from .sway import (
    cop_from_contacts,
    cop_mean_distance_2d,
    cop_mean_velocity,
    cop_mean_velocity_2d,
    cop_path_length,
    cop_path_length_2d,
    cop_range,
    cop_rms_distance,
    cop_rms_distance_2d,
    cop_sway_area,
    hold_last_defined,
    peak_com_excursion,
    sway_area,
    sway_area_2d,
)

#: samples per block of rows in :func:`compute_features` (a speed setting; results do not depend on it).
BLOCK_SAMPLES = 1 << 15


class _Window:
    """Channels of one trajectory cut to a block of rows and the window from onset, fetched once and
    shared by the features of that block."""

    def __init__(self, traj: Trajectory, rows: slice, start: int, settings: FeatureSettings):
        self.traj = traj
        self.rows = rows
        self.start = start
        self.settings = settings
        self.t = traj.t[start:]
        self._cache: dict[str, np.ndarray] = {}

    def get(self, name: str, feature: str) -> np.ndarray:
        if name not in self._cache:
            self._cache[name] = self.traj.get(name, feature)[self.rows, self.start:]
        return self._cache[name]

    def optional(self, name: str) -> np.ndarray | None:
        return self.traj.channels[name][self.rows, self.start:] if self.traj.has(name) else None

    def cop(self, feature: str, axis: str = "x") -> np.ndarray:
        """``cop_<axis>`` if logged, else derived from the contact groups' forces and positions (unloaded
        samples held, NaN rows kept)."""
        name = f"cop_{axis}"
        if name not in self._cache:
            if self.traj.has(name):
                self._cache[name] = self.traj.channels[name][self.rows, self.start:]
            else:
                groups = self.settings.contacts
                forces = [self.get(f"{g}_force", feature) for g in groups]
                positions = [self.get(f"{g}_{axis}", feature) for g in groups]
                held = hold_last_defined(cop_from_contacts(forces, positions))
                held[rows_with_nan(*forces, *positions)] = np.nan
                self._cache[name] = held
        return self._cache[name]

    def joints(self, kind: str, feature: str) -> list[np.ndarray]:
        return [self.get(f"{j}_{kind}", feature) for j in self.settings.joints]


def _fell(w: _Window, s: FeatureSettings) -> np.ndarray:
    return fell(w.get("com_z", "fell"), w.get("trunk_pitch", "fell"), s.fall_com_height, s.fall_trunk_pitch,
                w.optional("body_contact"))


def _margin(w: _Window, s: FeatureSettings) -> np.ndarray:
    f = "margin_of_stability"
    return margin_of_stability(w.get("com_x", f), w.get("com_vx", f), w.get(f"{s.rear}_x", f),
                               w.get(f"{s.front}_x", f), s.leg_length)


def _both(w: _Window, feature: str) -> tuple[np.ndarray, np.ndarray]:
    return w.cop(feature, "x"), w.cop(feature, "y")


_FEATURES: dict[str, Callable[[_Window, FeatureSettings], np.ndarray]] = {
    "fell": _fell,
    "recovery_time": lambda w, s: recovery_time(w.t, w.get("com_vx", "recovery_time"), s.recovery_speed),
    "peak_com_excursion": lambda w, s: peak_com_excursion(w.get("com_x", "peak_com_excursion")),
    "cop_path_length": lambda w, s: cop_path_length(w.cop("cop_path_length")),
    "cop_mean_velocity": lambda w, s: cop_mean_velocity(w.t, w.cop("cop_mean_velocity")),
    "cop_range": lambda w, s: cop_range(w.cop("cop_range")),
    "cop_rms_distance": lambda w, s: cop_rms_distance(w.cop("cop_rms_distance")),
    "sway_area": lambda w, s: sway_area(w.get("com_x", "sway_area"), w.get("com_z", "sway_area")),
    "margin_of_stability": _margin,
    "peak_joint_torque": lambda w, s: peak_joint_torque(w.joints("torque", "peak_joint_torque")),
    "positive_work": lambda w, s: positive_work(
        w.t, w.joints("torque", "positive_work"), w.joints("rate", "positive_work")
    ),
    # medio-lateral and 2-D forms (Prieto et al. 1996) for 3-D models
    "cop_path_length_ml": lambda w, s: cop_path_length(w.cop("cop_path_length_ml", "y")),
    "cop_path_length_2d": lambda w, s: cop_path_length_2d(*_both(w, "cop_path_length_2d")),
    "cop_mean_velocity_ml": lambda w, s: cop_mean_velocity(w.t, w.cop("cop_mean_velocity_ml", "y")),
    "cop_mean_velocity_2d": lambda w, s: cop_mean_velocity_2d(w.t, *_both(w, "cop_mean_velocity_2d")),
    "cop_range_ml": lambda w, s: cop_range(w.cop("cop_range_ml", "y")),
    "peak_com_excursion_ml": lambda w, s: peak_com_excursion(w.get("com_y", "peak_com_excursion_ml")),
    "sway_area_2d": lambda w, s: sway_area_2d(w.get("com_x", "sway_area_2d"), w.get("com_y", "sway_area_2d")),
    "cop_rms_distance_ml": lambda w, s: cop_rms_distance(w.cop("cop_rms_distance_ml", "y")),
    "cop_rms_distance_2d": lambda w, s: cop_rms_distance_2d(*_both(w, "cop_rms_distance_2d")),
    "cop_mean_distance_2d": lambda w, s: cop_mean_distance_2d(*_both(w, "cop_mean_distance_2d")),
    "cop_sway_area": lambda w, s: cop_sway_area(*_both(w, "cop_sway_area")),
}

#: Every feature :func:`compute_features` can compute: the scenario's list plus extras.
AVAILABLE_FEATURES: tuple[str, ...] = tuple(_FEATURES)


def feature_channels(name: str, settings: FeatureSettings) -> tuple[str, ...]:
    """Channels feature ``name`` reads from a trajectory without ``cop_x`` / ``cop_y`` (the centre of pressure
    is then derived from the contact groups); ``fell`` also reads ``body_contact`` when present."""
    groups = settings.contacts
    cop = {axis: (*(f"{g}_force" for g in groups), *(f"{g}_{axis}" for g in groups)) for axis in "xy"}
    if name.startswith("cop_"):
        if name.endswith("_2d") or name == "cop_sway_area":
            return tuple(dict.fromkeys((*cop["x"], *cop["y"])))
        return cop["y"] if name.endswith("_ml") else cop["x"]
    joints = settings.joints
    return {
        "fell": ("com_z", "trunk_pitch", "body_contact"),
        "recovery_time": ("com_vx",),
        "peak_com_excursion": ("com_x",),
        "peak_com_excursion_ml": ("com_y",),
        "sway_area": ("com_x", "com_z"),
        "sway_area_2d": ("com_x", "com_y"),
        "margin_of_stability": ("com_x", "com_vx", f"{settings.rear}_x", f"{settings.front}_x"),
        "peak_joint_torque": tuple(f"{j}_torque" for j in joints),
        "positive_work": tuple(f"{j}_{kind}" for kind in ("torque", "rate") for j in joints),
    }[name]


_DEFAULT = FeatureSettings(names=FEATURE_NAMES, fall_com_height=0.35, fall_trunk_pitch=1.2, recovery_speed=0.05,
                           leg_length=0.66)
#: channels each feature reads on the bundled planar body (:func:`feature_channels` for any body)
FEATURE_CHANNELS: dict[str, tuple[str, ...]] = {
    name: feature_channels(name, _DEFAULT) for name in AVAILABLE_FEATURES if name in FEATURE_NAMES
    or name == "cop_rms_distance"
}


def channels_needed(names: Sequence[str], settings: FeatureSettings = _DEFAULT) -> tuple[str, ...]:
    """Channels :func:`compute_features` reads for the features ``names`` from a trajectory without
    ``cop_x`` / ``cop_y``, each once, in first-use order. A trajectory cut down to them gives the same
    features (the simulator uses this to low-pass only what is measured)."""
    return tuple(dict.fromkeys(c for n in names for c in feature_channels(n, settings)))


def compute_features(
    traj: Trajectory, settings: FeatureSettings, names: Sequence[str] | None = None
) -> dict[str, np.ndarray]:
    """Balance features of every trial in ``traj``, measured from ``traj.onset`` to the end.

    Args:
        traj: a batch of simulated rollouts or hardware trials; channels ``(nbatch x nstep)`` SI.
        settings: the scenario's thresholds (fall height and pitch, recovery speed, leg length) and what
            the features read of the body (joints, contact groups, base-of-support edges).
        names: features to compute (default: all of ``scenario.FEATURE_NAMES``); any of
            :data:`AVAILABLE_FEATURES`.

    Returns:
        feature name -> ``(nbatch,)`` float (``fell`` as 0.0 / 1.0); NaN for rows with NaN input.

    Raises:
        MissingChannelError: a requested feature needs a channel the trajectory lacks.
        ValueError: an unknown feature name.
    """
    names = FEATURE_NAMES if names is None else tuple(names)
    unknown = [n for n in names if n not in _FEATURES]
    if unknown:
        raise ValueError(f"unknown feature(s) {', '.join(unknown)}; use names from: {', '.join(_FEATURES)}")
    start = onset_index(traj.t, traj.onset)
    nbatch = traj.nbatch
    out = {n: np.empty(nbatch) for n in names}
    # Blocks of rows keep each temporary small: it stays in cache and in the allocator's heap, where
    # whole-batch temporaries (megabytes each) would be mapped and faulted in afresh on every call.
    step = max(1, BLOCK_SAMPLES // max(len(traj.t) - start, 1))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for first in range(0, nbatch, step):
            rows = slice(first, min(first + step, nbatch))
            window = _Window(traj, rows, start, settings)
            for n in names:
                out[n][rows] = _FEATURES[n](window, settings)
    return out
