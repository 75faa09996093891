"""Balance features over a :class:`~gapgauge.trajectory.Trajectory`, vectorised over the batch.

One code path serves simulated rollouts and hardware logs: every feature is a plain function of
``(nbatch x nstep)`` arrays in SI units, and :func:`compute_features` only picks the channels out of a
trajectory, cuts the window from the disturbance onset to the end, and calls those functions. There
is no Python loop over rollouts, so a chunk of a sweep (e.g. 256 x 1,500 samples) takes milliseconds.

Conventions shared by every feature:

- Window: the samples with ``t >= onset`` up to the last one. Hardware logs share the simulation's
  time zero, so the same window applies to both. A body that fell before the onset is still down at
  the onset, so the window does not hide falls.
- A row holding NaN in a channel a feature reads (a diverged rollout) gives NaN for that feature and
  that row, silently; the other rows are unaffected.
- A feature that needs a channel the trajectory lacks raises
  :class:`~gapgauge.trajectory.MissingChannelError` naming the feature and the channel. The one
  derived channel is the centre of pressure: without ``cop_x`` it is computed from the heel and toe
  forces (:func:`cop_from_foot_forces`).

Sources: Prieto et al. (1996), IEEE Trans. Biomed. Eng. 43(9):956-966 (centre-of-pressure measures);
Schubert and Kirchner (2014), Gait and Posture (the 95% prediction ellipse); Hof, Gazendam and Sinke
(2005), J. Biomech. 38:1-8 (extrapolated centre of mass and margin of stability).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np

from .scenario import FEATURE_NAMES, FeatureSettings
from .trajectory import JOINTS, MissingChannelError, Trajectory

if TYPE_CHECKING:  # pragma: no cover
    from .scenario import Scenario

#: Standard gravity, m/s^2 (the value Hof et al. 2005 use for omega0).
GRAVITY = 9.81
#: chi-square quantile with 2 degrees of freedom at 0.95. Its CDF is 1 - exp(-x / 2), so the
#: quantile is -2 ln(0.05) = 5.9915 in closed form (avoids importing scipy.stats on the hot path).
CHI2_95_2DOF = -2.0 * math.log(0.05)
#: N: a contact force on a non-foot segment above this counts as a fall. Small, but above the
#: numerical chatter of a resting contact.
BODY_CONTACT_FORCE = 1.0
#: N: below this total vertical force under the foot the centre of pressure is undefined (about 1%
#: of the stand-in's 40 kg body weight; noisy force sensors near zero load give wild ratios).
MIN_FOOT_LOAD = 5.0
#: samples per block of rows in :func:`compute_features` (a speed setting; results do not depend on it).
BLOCK_SAMPLES = 1 << 15


# ---- helpers ---------------------------------------------------------------------------------


def _rows_with_nan(*arrays: np.ndarray) -> np.ndarray:
    """``(nbatch,)`` bool: rows holding a NaN in any of the ``(nbatch x nstep)`` arrays."""
    bad = np.zeros(arrays[0].shape[0], dtype=bool)
    for a in arrays:
        # A row sum is NaN exactly when the row holds a NaN (or both infinities): one fast pass.
        bad |= np.isnan(np.sum(a, axis=1))
    return bad


def onset_index(t: np.ndarray, onset: float) -> int:
    """Index of the first sample at or after ``onset`` (s) in ``t (nstep,) s``; the last sample if none."""
    return min(int(np.searchsorted(t, onset, side="left")), len(t) - 1)


def cop_from_foot_forces(
    heel_force: np.ndarray,
    toe_force: np.ndarray,
    heel_x: np.ndarray,
    toe_x: np.ndarray,
    min_force: float = MIN_FOOT_LOAD,
) -> np.ndarray:
    """Centre of pressure (m) from two vertical contact forces: their force-weighted mean position.

    ``cop = (F_heel x_heel + F_toe x_toe) / (F_heel + F_toe)`` (statics: the lever rule; the resultant
    of two parallel forces acts where their moments balance).

    Args:
        heel_force, toe_force: vertical ground reaction forces, ``(nbatch x nstep)`` N.
        heel_x, toe_x: horizontal positions of the heel and toe contacts, ``(nbatch x nstep)`` m.
        min_force: N; where the total force is below it the foot is unloaded and the centre of
            pressure is undefined.

    Returns:
        ``(nbatch x nstep)`` m, NaN where the foot is unloaded (or an input is NaN); never warns.
    """
    total = heel_force + toe_force
    with np.errstate(invalid="ignore", divide="ignore"):
        cop = (heel_force * heel_x + toe_force * toe_x) / total
    cop[~(total >= min_force)] = np.nan
    return cop


def hold_last_defined(x: np.ndarray) -> np.ndarray:
    """Fill NaN samples of each row with the last defined value before them (the first defined
    value for leading NaN). Rows with no defined sample stay NaN.

    Used for the centre of pressure while the foot is unloaded: it stays where it was last, so no
    excursion is counted in the air, only the jump at touch-down.

    Args:
        x: ``(nbatch x nstep)``, any unit.

    Returns:
        ``(nbatch x nstep)``, same unit.
    """
    defined = ~np.isnan(x)
    nstep = x.shape[1]
    idx = np.where(defined, np.arange(nstep), 0)
    np.maximum.accumulate(idx, axis=1, out=idx)
    # Before a row's first defined sample idx is 0; point those at the first defined sample instead.
    first = np.argmax(defined, axis=1)[:, None]
    idx = np.where((idx == 0) & ~defined[:, :1], first, idx)
    return np.take_along_axis(x, idx, axis=1)


# ---- features on plain arrays -----------------------------------------------------------------


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
    out[_rows_with_nan(com_vx)] = np.nan
    return out


def peak_com_excursion(com_x: np.ndarray) -> np.ndarray:
    """Peak centre-of-mass excursion (m): ``max_t |com_x(t) - com_x(t0)|`` with ``t0`` the first sample
    (the disturbance onset).

    Args:
        com_x: horizontal centre-of-mass position, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    start = com_x[:, 0]
    # max |x - x0| = max(max x - x0, x0 - min x): reductions only, no temporary array.
    return np.maximum(np.max(com_x, axis=1) - start, start - np.min(com_x, axis=1))


def cop_path_length(cop_x: np.ndarray) -> np.ndarray:
    """Centre-of-pressure total excursion (m): ``sum_i |cop[i+1] - cop[i]|`` (Prieto et al. 1996,
    IEEE TBME 43(9):956-966, "total excursion", here in one horizontal axis).

    Args:
        cop_x: centre of pressure, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    steps = np.diff(cop_x, axis=1)
    return np.sum(np.abs(steps, out=steps), axis=1)


def cop_mean_velocity(t: np.ndarray, cop_x: np.ndarray) -> np.ndarray:
    """Centre-of-pressure mean velocity (m/s): total excursion / duration, duration ``t[-1] - t[0]``
    (Prieto et al. 1996, IEEE TBME 43(9):956-966).

    Args:
        t: window times, ``(nstep,)`` s.
        cop_x: centre of pressure, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m/s; NaN for rows with NaN input (and for a window of one sample).
    """
    duration = float(t[-1] - t[0])
    if duration <= 0.0:
        return np.full(cop_x.shape[0], np.nan)
    return cop_path_length(cop_x) / duration


def cop_range(cop_x: np.ndarray) -> np.ndarray:
    """Centre-of-pressure range (m): ``max_t cop - min_t cop`` (Prieto et al. 1996, IEEE TBME
    43(9):956-966).

    Args:
        cop_x: centre of pressure, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    return np.max(cop_x, axis=1) - np.min(cop_x, axis=1)


def cop_rms_distance(cop_x: np.ndarray) -> np.ndarray:
    """Centre-of-pressure RMS distance (m) from its mean: ``sqrt(mean_t (cop - mean cop)^2)``
    (Prieto et al. 1996, IEEE TBME 43(9):956-966). Not in the scenario's feature list; available
    by name in :func:`compute_features`.

    Args:
        cop_x: centre of pressure, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    centred = cop_x - cop_x.mean(axis=1, keepdims=True)
    return np.sqrt(np.einsum("ij,ij->i", centred, centred) / cop_x.shape[1])


def sway_area(com_x: np.ndarray, com_z: np.ndarray) -> np.ndarray:
    """Sway area (m^2): area of the 95% prediction ellipse of the sagittal centre-of-mass trace
    ``(com_x, com_z)``: ``pi * chi2_{0.95,2} * sqrt(det C)`` with ``C`` the 2 x 2 sample covariance
    (divisor n - 1) and ``chi2_{0.95,2} = 5.991`` (Schubert and Kirchner 2014, Gait and Posture).

    Args:
        com_x: horizontal centre-of-mass position, ``(nbatch x nstep)`` m.
        com_z: centre-of-mass height, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m^2; NaN for rows with NaN input (and for a window of one sample).
    """
    n = com_x.shape[1]
    if n < 2:
        return np.full(com_x.shape[0], np.nan)
    dx = com_x - com_x.mean(axis=1, keepdims=True)
    dz = com_z - com_z.mean(axis=1, keepdims=True)
    sxx = np.einsum("ij,ij->i", dx, dx)
    szz = np.einsum("ij,ij->i", dz, dz)
    sxz = np.einsum("ij,ij->i", dx, dz)
    det = (sxx * szz - sxz * sxz) / (n - 1) ** 2
    # Rounding can leave a tiny negative determinant for a trace on a line.
    return math.pi * CHI2_95_2DOF * np.sqrt(np.maximum(det, 0.0))


def extrapolated_com(
    com_x: np.ndarray, com_vx: np.ndarray, leg_length: float, g: float = GRAVITY
) -> np.ndarray:
    """Extrapolated centre of mass (m): ``XcoM = x + v / omega0``, ``omega0 = sqrt(g / l)``
    (Hof, Gazendam and Sinke 2005, J. Biomech. 38:1-8).

    Args:
        com_x: horizontal centre-of-mass position, ``(nbatch x nstep)`` m.
        com_vx: horizontal centre-of-mass velocity, ``(nbatch x nstep)`` m/s.
        leg_length: pendulum length ``l``, m. g: m/s^2.

    Returns:
        ``(nbatch x nstep)`` m.
    """
    return com_x + com_vx * math.sqrt(leg_length / g)


def margin_of_stability_series(
    com_x: np.ndarray,
    com_vx: np.ndarray,
    heel_x: np.ndarray,
    toe_x: np.ndarray,
    leg_length: float,
    g: float = GRAVITY,
) -> np.ndarray:
    """Margin of stability over time (m): distance from the extrapolated centre of mass to the edge
    of the base of support in the direction of motion, positive while inside: ``toe_x - XcoM`` when
    ``com_vx >= 0``, ``XcoM - heel_x`` when ``com_vx < 0`` (Hof, Gazendam and Sinke 2005, J. Biomech.
    38:1-8).

    Args:
        com_x: ``(nbatch x nstep)`` m. com_vx: ``(nbatch x nstep)`` m/s.
        heel_x, toe_x: rear and front edges of the support, ``(nbatch x nstep)`` m.
        leg_length: pendulum length ``l`` for ``omega0 = sqrt(g / l)``, m. g: m/s^2.

    Returns:
        ``(nbatch x nstep)`` m.
    """
    xcom = extrapolated_com(com_x, com_vx, leg_length, g)
    to_toe = np.subtract(toe_x, xcom)
    # A blend instead of np.where (slow when the sign flips often), in place to keep temporaries few:
    # to_heel + forward * (to_toe - to_heel), exact because forward is 0 or 1.
    to_heel = np.subtract(xcom, heel_x, out=xcom)
    to_toe -= to_heel
    to_toe *= com_vx >= 0.0
    return np.add(to_toe, to_heel, out=to_toe)


def margin_of_stability(
    com_x: np.ndarray,
    com_vx: np.ndarray,
    heel_x: np.ndarray,
    toe_x: np.ndarray,
    leg_length: float,
    g: float = GRAVITY,
) -> np.ndarray:
    """Margin of stability (m): the minimum over the window of :func:`margin_of_stability_series`
    (Hof, Gazendam and Sinke 2005, J. Biomech. 38:1-8). Negative means the extrapolated centre of
    mass left the base of support at some time.

    Args: as :func:`margin_of_stability_series`.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    # A NaN velocity leaves XcoM NaN, so that row of the series and its minimum are NaN.
    return np.min(margin_of_stability_series(com_x, com_vx, heel_x, toe_x, leg_length, g), axis=1)


def peak_joint_torque(torques: Sequence[np.ndarray]) -> np.ndarray:
    """Peak joint torque (N m): ``max over joints and time of |torque|``.

    Args:
        torques: one ``(nbatch x nstep)`` array in N m per joint (ankle, knee, hip).

    Returns:
        ``(nbatch,)`` N m; NaN for rows with NaN input.
    """
    # max |tau| = max(max tau, -min tau): reductions only, no temporary array. np.maximum keeps NaN.
    peak = np.full(torques[0].shape[0], -np.inf)
    for tau in torques:
        peak = np.maximum(peak, np.maximum(np.max(tau, axis=1), -np.min(tau, axis=1)))
    return peak


def positive_work(t: np.ndarray, torques: Sequence[np.ndarray], rates: Sequence[np.ndarray]) -> np.ndarray:
    """Positive mechanical work (J): ``sum over joints of integral max(tau * omega, 0) dt``, the
    energy the actuators put in (braking, negative power, is not subtracted). The integral uses the
    trapezoid rule on the sampled clipped power, on the (possibly uneven) time base ``t``.

    Args:
        t: window times, ``(nstep,)`` s.
        torques: one ``(nbatch x nstep)`` array in N m per joint.
        rates: the matching joint rates, ``(nbatch x nstep)`` rad/s, same order.

    Returns:
        ``(nbatch,)`` J; NaN for rows with NaN input.
    """
    # Trapezoid weights: each sample carries half of the intervals on either side.
    half_dt = 0.5 * np.diff(t)
    weights = np.zeros(len(t))
    weights[:-1] += half_dt
    weights[1:] += half_dt
    work = np.zeros(torques[0].shape[0])
    for tau, omega in zip(torques, rates, strict=True):
        power = tau * omega
        work += np.maximum(power, 0.0, out=power) @ weights
    return work


# ---- the trajectory front end ------------------------------------------------------------------


class _Window:
    """Channels of one trajectory cut to a block of rows and the window from onset, fetched once and
    shared by the features of that block."""

    def __init__(self, traj: Trajectory, rows: slice, start: int):
        self.traj = traj
        self.rows = rows
        self.start = start
        self.t = traj.t[start:]
        self._cache: dict[str, np.ndarray] = {}

    def get(self, name: str, feature: str) -> np.ndarray:
        if name not in self._cache:
            self._cache[name] = self.traj.get(name, feature)[self.rows, self.start:]
        return self._cache[name]

    def optional(self, name: str) -> np.ndarray | None:
        return self.traj.channels[name][self.rows, self.start:] if self.traj.has(name) else None

    def cop(self, feature: str) -> np.ndarray:
        """``cop_x`` if logged, else derived from the foot forces (unloaded samples held, NaN rows kept)."""
        if "cop_x" not in self._cache:
            if self.traj.has("cop_x"):
                self._cache["cop_x"] = self.traj.channels["cop_x"][self.rows, self.start:]
            else:
                parts = [self.get(n, feature) for n in ("heel_force", "toe_force", "heel_x", "toe_x")]
                held = hold_last_defined(cop_from_foot_forces(*parts))
                held[_rows_with_nan(*parts)] = np.nan
                self._cache["cop_x"] = held
        return self._cache["cop_x"]

    def joints(self, kind: str, feature: str) -> list[np.ndarray]:
        return [self.get(f"{j}_{kind}", feature) for j in JOINTS]


def _fell(w: _Window, s: FeatureSettings) -> np.ndarray:
    return fell(w.get("com_z", "fell"), w.get("trunk_pitch", "fell"), s.fall_com_height, s.fall_trunk_pitch,
                w.optional("body_contact"))


def _margin(w: _Window, s: FeatureSettings) -> np.ndarray:
    f = "margin_of_stability"
    return margin_of_stability(w.get("com_x", f), w.get("com_vx", f), w.get("heel_x", f), w.get("toe_x", f),
                               s.leg_length)


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
}

#: Every feature :func:`compute_features` can compute: the scenario's list plus extras.
AVAILABLE_FEATURES: tuple[str, ...] = tuple(_FEATURES)

_COP_PARTS = ("heel_force", "toe_force", "heel_x", "toe_x")
#: channels each feature reads from a trajectory without ``cop_x`` (the centre of pressure is then derived
#: from the foot forces); ``fell`` also reads ``body_contact`` when the trajectory has it.
FEATURE_CHANNELS: dict[str, tuple[str, ...]] = {
    "fell": ("com_z", "trunk_pitch", "body_contact"),
    "recovery_time": ("com_vx",),
    "peak_com_excursion": ("com_x",),
    "cop_path_length": _COP_PARTS,
    "cop_mean_velocity": _COP_PARTS,
    "cop_range": _COP_PARTS,
    "cop_rms_distance": _COP_PARTS,
    "sway_area": ("com_x", "com_z"),
    "margin_of_stability": ("com_x", "com_vx", "heel_x", "toe_x"),
    "peak_joint_torque": tuple(f"{j}_torque" for j in JOINTS),
    "positive_work": tuple(f"{j}_{kind}" for kind in ("torque", "rate") for j in JOINTS),
}


def channels_needed(names: Sequence[str]) -> tuple[str, ...]:
    """Channels :func:`compute_features` reads for the features ``names`` from a trajectory without
    ``cop_x``, each once, in first-use order. A trajectory cut down to them gives the same features
    (the simulator uses this to low-pass only what is measured)."""
    return tuple(dict.fromkeys(c for n in names for c in FEATURE_CHANNELS[n]))


def compute_features(
    traj: Trajectory, settings: FeatureSettings, names: Sequence[str] | None = None
) -> dict[str, np.ndarray]:
    """Balance features of every trial in ``traj``, measured from ``traj.onset`` to the end.

    Args:
        traj: a batch of simulated rollouts or hardware trials; channels ``(nbatch x nstep)`` SI.
        settings: the scenario's thresholds (fall height and pitch, recovery speed, leg length).
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
            window = _Window(traj, rows, start)
            for n in names:
                out[n][rows] = _FEATURES[n](window, settings)
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


__all__ = [
    "AVAILABLE_FEATURES",
    "BODY_CONTACT_FORCE",
    "FEATURE_CHANNELS",
    "CHI2_95_2DOF",
    "GRAVITY",
    "MIN_FOOT_LOAD",
    "MissingChannelError",
    "channels_needed",
    "compute_features",
    "cop_from_foot_forces",
    "cop_mean_velocity",
    "cop_path_length",
    "cop_range",
    "cop_rms_distance",
    "extrapolated_com",
    "fell",
    "hold_last_defined",
    "margin_of_stability",
    "margin_of_stability_series",
    "onset_index",
    "peak_com_excursion",
    "peak_joint_torque",
    "positive_work",
    "recovery_time",
    "success",
    "sway_area",
]
