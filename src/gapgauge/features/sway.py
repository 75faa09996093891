"""Centre-of-pressure and sway measures: the centre of pressure from the foot forces, its path length,
mean velocity, range and RMS distance (Prieto et al. 1996, IEEE Trans. Biomed. Eng. 43(9):956-966), the
peak centre-of-mass excursion and the sway area as a 95% prediction ellipse (Schubert and Kirchner 2014,
Gait and Posture).

Every function takes ``(nbatch x nstep)`` arrays in SI and returns ``(nbatch,)`` (or ``(nbatch x nstep)``
for the centre-of-pressure series).
"""

from __future__ import annotations

import math

import numpy as np

#: chi-square quantile with 2 degrees of freedom at 0.95. Its CDF is 1 - exp(-x / 2), so the
#: quantile is -2 ln(0.05) = 5.9915 in closed form (avoids importing scipy.stats on the hot path).
CHI2_95_2DOF = -2.0 * math.log(0.05)
#: N: below this total vertical force under the foot the centre of pressure is undefined (about 1%
#: of the stand-in's 40 kg body weight; noisy force sensors near zero load give wild ratios).
MIN_FOOT_LOAD = 5.0


def cop_from_contacts(
    forces: list[np.ndarray], positions: list[np.ndarray], min_force: float = MIN_FOOT_LOAD
) -> np.ndarray:
    """Centre of pressure (m) from the vertical forces of any number of contact groups: their
    force-weighted mean position, ``cop = sum_i F_i x_i / sum_i F_i`` (statics: the resultant of parallel
    forces acts where their moments balance). With two groups (heel and toe) it is the lever rule of
    :func:`cop_from_foot_forces`, to the last bit.

    Args:
        forces: one ``(nbatch x nstep)`` array of vertical force in N per contact group.
        positions: the groups' positions along one horizontal axis, ``(nbatch x nstep)`` m, same order.
        min_force: N; where the total force is below it the feet are unloaded and the centre of
            pressure is undefined.

    Returns:
        ``(nbatch x nstep)`` m, NaN where the feet are unloaded (or an input is NaN); never warns.
    """
    total = forces[0]
    moment = forces[0] * positions[0]
    for force, position in zip(forces[1:], positions[1:], strict=True):
        total = total + force
        moment = moment + force * position
    with np.errstate(invalid="ignore", divide="ignore"):
        cop = moment / total
    cop[~(total >= min_force)] = np.nan
    return cop


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


def ellipse_area(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Area of the 95% prediction ellipse of the 2-D trace ``(a, b)``, ``(nbatch x nstep)`` each, in the
    square of their unit: ``pi * chi2_{0.95,2} * sqrt(det C)``, ``C`` the 2 x 2 sample covariance (divisor
    n - 1) (Schubert and Kirchner 2014, Gait and Posture). NaN for rows with NaN input or one sample."""
    return sway_area(a, b)


def sway_area_2d(com_x: np.ndarray, com_y: np.ndarray) -> np.ndarray:
    """Horizontal sway area (m^2) of a 3-D body: the 95% prediction ellipse of the centre-of-mass trace in
    the horizontal plane ``(com_x, com_y)`` (Schubert and Kirchner 2014), ``(nbatch,)``."""
    return ellipse_area(com_x, com_y)


def cop_sway_area(cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """Centre-of-pressure sway area (m^2): the 95% prediction ellipse of the COP trace ``(cop_x, cop_y)``
    (Prieto et al. 1996 give the confidence ellipse; the prediction ellipse after Schubert and Kirchner 2014)."""
    return ellipse_area(cop_x, cop_y)


def cop_path_length_2d(cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """Centre-of-pressure total excursion in the plane (m): ``sum_i sqrt(dAP_i^2 + dML_i^2)`` (Prieto et al.
    1996, IEEE TBME 43(9):956-966, TOTEX).

    Args:
        cop_x, cop_y: anterior-posterior and medio-lateral centre of pressure, ``(nbatch x nstep)`` m.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    return np.sum(np.hypot(np.diff(cop_x, axis=1), np.diff(cop_y, axis=1)), axis=1)


def cop_mean_velocity_2d(t: np.ndarray, cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """Centre-of-pressure mean velocity in the plane (m/s): TOTEX / duration (Prieto et al. 1996, MVELO)."""
    duration = float(t[-1] - t[0])
    if duration <= 0.0:
        return np.full(cop_x.shape[0], np.nan)
    return cop_path_length_2d(cop_x, cop_y) / duration


def _resultant_distance(cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """``RD = sqrt(AP^2 + ML^2)`` of the mean-removed trace (Prieto et al. 1996), ``(nbatch x nstep)`` m."""
    return np.hypot(cop_x - cop_x.mean(axis=1, keepdims=True), cop_y - cop_y.mean(axis=1, keepdims=True))


def cop_rms_distance_2d(cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """Centre-of-pressure RMS distance in the plane (m): ``sqrt(mean RD^2)`` (Prieto et al. 1996, RDIST)."""
    rd = _resultant_distance(cop_x, cop_y)
    return np.sqrt(np.einsum("ij,ij->i", rd, rd) / cop_x.shape[1])


def cop_mean_distance_2d(cop_x: np.ndarray, cop_y: np.ndarray) -> np.ndarray:
    """Centre-of-pressure mean distance in the plane (m): ``mean RD`` (Prieto et al. 1996, MDIST)."""
    return _resultant_distance(cop_x, cop_y).mean(axis=1)
