"""Joint effort: the peak joint torque and the positive mechanical work of the actuators."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


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
