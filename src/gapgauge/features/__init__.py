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
  derived channel is the centre of pressure: without ``cop_x`` (``cop_y``) it is computed from the
  forces and positions of the contact groups the settings name (:func:`cop_from_contacts`; heel and toe
  on the bundled planar body).
- Joint torque and positive work sum over the actuated joints the settings name; a 3-D model adds
  the medio-lateral and 2-D forms of the sway measures (Prieto et al. 1996).

Sources: Prieto et al. (1996), IEEE Trans. Biomed. Eng. 43(9):956-966 (centre-of-pressure measures);
Schubert and Kirchner (2014), Gait and Posture (the 95% prediction ellipse); Hof, Gazendam and Sinke
(2005), J. Biomech. 38:1-8 (extrapolated centre of mass and margin of stability).

Modules: :mod:`.sway` (centre of pressure and sway), :mod:`.stability` (margin of stability),
:mod:`.effort` (joint torque and work), :mod:`.falls` (fall, recovery and success rules),
:mod:`.compute` (the trajectory front end: :func:`compute_features`, :func:`channels_needed`).
"""

from __future__ import annotations

from ..trajectory import MissingChannelError
from .base import onset_index
from .compute import (
    AVAILABLE_FEATURES,
    BLOCK_SAMPLES,
    FEATURE_CHANNELS,
    channels_needed,
    compute_features,
    feature_channels,
)
from .effort import peak_joint_torque, positive_work
from .falls import BODY_CONTACT_FORCE, fell, recovery_time, success
from .stability import GRAVITY, extrapolated_com, margin_of_stability, margin_of_stability_series
from .sway import (
    CHI2_95_2DOF,
    MIN_FOOT_LOAD,
    cop_from_contacts,
    cop_from_foot_forces,
    cop_mean_distance_2d,
    cop_mean_velocity,
    cop_mean_velocity_2d,
    cop_path_length,
    cop_path_length_2d,
    cop_range,
    cop_rms_distance,
    cop_rms_distance_2d,
    cop_sway_area,
    ellipse_area,
    hold_last_defined,
    peak_com_excursion,
    sway_area,
    sway_area_2d,
)

__all__ = [
    "AVAILABLE_FEATURES",
    "BLOCK_SAMPLES",
    "BODY_CONTACT_FORCE",
    "CHI2_95_2DOF",
    "FEATURE_CHANNELS",
    "GRAVITY",
    "MIN_FOOT_LOAD",
    "MissingChannelError",
    "channels_needed",
    "compute_features",
    "cop_from_contacts",
    "cop_mean_distance_2d",
    "cop_mean_velocity_2d",
    "cop_path_length_2d",
    "cop_rms_distance_2d",
    "cop_sway_area",
    "ellipse_area",
    "feature_channels",
    "sway_area_2d",
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
