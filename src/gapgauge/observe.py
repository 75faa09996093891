"""How the robot's logger sees a trajectory: resampled to the logging rate and low-passed.

Simulated and hardware features must be measured the same way, or the shift statistics, the prior
and the calibration would read a filter difference as a physics difference (peak torque, positive
work and the centre-of-pressure measures move by more than the simulated spread under a 40 Hz
low-pass). So every trajectory, simulated or logged, goes through :func:`logger_view` before
:func:`gapgauge.features.compute_features`.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from .scenario import Hardware
from .trajectory import Trajectory

LOWPASS_ORDER = 4  # Butterworth order of each pass; sosfiltfilt doubles the effective order


def lowpass(values: np.ndarray, cutoff_hz: float, rate_hz: float, order: int = LOWPASS_ORDER) -> np.ndarray:
    """Zero-phase Butterworth low-pass along the last axis (``scipy.signal.sosfiltfilt``).

    Args:
        values: ``(..., n)`` samples at ``rate_hz``, e.g. ``(nbatch x nstep)``.
        cutoff_hz: -3 dB frequency of each pass, Hz (below ``rate_hz / 2``).

    Short series get the longest padding they allow (sosfiltfilt's default needs ``n > 3 (2 nsection + 1)``).
    """
    sos = signal.butter(order, cutoff_hz, btype="low", fs=rate_hz, output="sos")
    default_pad = 3 * (2 * len(sos) + 1)
    return signal.sosfiltfilt(sos, values, axis=-1, padlen=min(default_pad, values.shape[-1] - 1))


def logger_view(traj: Trajectory, hardware: Hardware, skip: tuple[str, ...] = ("body_contact",)) -> Trajectory:
    """The trajectory as the hardware logger would record it after ingestion.

    Resampled (linear interpolation) onto ``k / sample_rate_hz`` when the time step differs, then
    low-passed at ``lowpass_hz`` when the scenario sets one. Rows with a non-finite sample are left
    as they are (their features come out NaN anyway). Channels in ``skip`` pass unfiltered
    (body contact is a simulation-only event signal, not a logged measurement).
    """
    rate = hardware.sample_rate_hz
    t = traj.t
    channels = dict(traj.channels)
    if abs(traj.dt * rate - 1.0) > 1e-9:
        grid = np.arange(int(np.ceil(t[0] * rate - 1e-6)), int(np.floor(t[-1] * rate + 1e-6)) + 1) / rate
        channels = {c: np.vstack([np.interp(grid, t, row) for row in v]) for c, v in channels.items()}
        t = grid
    if hardware.lowpass_hz is not None and hardware.lowpass_hz < rate / 2:
        for name, values in channels.items():
            if name in skip:
                continue
            ok = np.isfinite(values).all(axis=1)
            if ok.all():
                channels[name] = lowpass(values, hardware.lowpass_hz, rate)
            elif ok.any():
                out = values.copy()
                out[ok] = lowpass(values[ok], hardware.lowpass_hz, rate)
                channels[name] = out
    return Trajectory(t, channels, traj.onset, dict(traj.meta))
