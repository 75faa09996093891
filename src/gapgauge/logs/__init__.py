"""Hardware log readers: CSV + sidecar JSON (:mod:`.csv`) and ROS 2 bags / MCAP (:mod:`.bag`).

The hardware log contract (DESIGN.md section 4, DEVELOPERS.md "Hardware log"): one CSV per trial with
a header row, the time column and one column per mapped channel, units as the scenario's
``[hardware.time]`` and ``[hardware.columns]`` declare them; beside it a sidecar JSON with the same
stem (``trial_003.csv`` + ``trial_003.json``)::

    {"params": {name: value}, "robot_id": str, "recorded_at": ISO-8601,
     "outcome": "stood" | "fell" | null, "notes": str, "synthetic": bool}

A CSV log's time is seconds since the start of the trial, on the scenario's clock (the disturbance begins
at ``scenario.task.onset``); a bag keeps its own clock. Either way the trial is placed in time by the
sidecar (``disturbance_at``, ``trial_start_at``, ``trigger``) or by the onset estimated from the log
(:mod:`.align`). :func:`read_log` converts every column to SI with the exact factors of
:mod:`gapgauge.units` and checks the samples at two levels (:mod:`.checks`): impossible values (not
finite, time not strictly increasing, a gap longer than ``max_gap_s``, slower than ``min_rate_hz``, an
angle beyond the compiled model's joint range plus slack) refuse the file with a one-line
:class:`LogError` naming the file, line and column, what is wrong and the fix; unusual values (beyond the
plausible range, spikes) are kept as flags per channel. Every channel is then resampled by linear
interpolation onto ``k / sample_rate_hz`` and low-passed when ``[hardware].lowpass_hz`` is set
(Butterworth, zero phase). After the matched simulations exist, :mod:`.units_check` compares each
channel's scale with theirs (a declared unit off by a unit factor refuses the file).

Modules: :mod:`.sidecar` (the sidecar and the size check), :mod:`.checks` (the two levels of check),
:mod:`.align` (placing a trial in time), :mod:`.common` (the trial record and :func:`build_trial`),
:mod:`.csv` and :mod:`.bag` (one reader each), :mod:`.units_check` (scales against the simulation); this
package's :func:`read_log` picks the reader by the path. Nothing here touches the store or the simulator.

"""

from __future__ import annotations

from pathlib import Path

from ..errors import LogError
from ..scenario import Scenario
from .align import Alignment, Onset, estimate_onset
from .bag import read_bag
from .checks import JOINT_LIMIT_SLACK, ChannelFlag, body_mass, body_weight, plausible_limits
from .common import LogTrial, Stream, build_trial
from .csv import BLOCK_ROWS, MAX_LINE_BYTES, read_csv, read_csv_stream
from .sidecar import MAX_SIDECAR_BYTES, OUTCOMES, SIDECAR_KEYS, Sidecar, check_size, read_sidecar, sidecar_path_for
from .units_check import UnitFinding, check_units

__all__ = [
    "BAG_SUFFIXES",
    "BLOCK_ROWS",
    "JOINT_LIMIT_SLACK",
    "MAX_LINE_BYTES",
    "MAX_SIDECAR_BYTES",
    "OUTCOMES",
    "SIDECAR_KEYS",
    "Alignment",
    "ChannelFlag",
    "LogTrial",
    "Onset",
    "Sidecar",
    "Stream",
    "UnitFinding",
    "body_mass",
    "body_weight",
    "build_trial",
    "check_size",
    "check_units",
    "estimate_onset",
    "plausible_limits",
    "read_bag",
    "read_csv",
    "read_csv_stream",
    "read_log",
    "read_sidecar",
    "sidecar_path_for",
]

#: file suffixes read as ROS 2 bags (a folder is a bag too)
BAG_SUFFIXES = (".mcap", ".db3")


def read_log(scenario: Scenario, path: str | Path) -> LogTrial:
    """Read, validate and resample one hardware log and its sidecar.

    Args:
        scenario: the scenario whose ``[hardware]`` table maps the log's columns.
        path: a ``.csv`` log, or a ROS 2 bag (folder, ``.mcap`` or ``.db3`` file; needs the ``rosbag``
            extra). The sidecar JSON has the same stem beside it.

    Returns:
        :class:`LogTrial` with the trajectory in SI on ``t = k / sample_rate_hz`` over the logged span.

    Raises:
        LogError: one line naming the file (and line and column), what is wrong and the fix.
        ScenarioError: the scenario's model does not compile (its joint limits are needed for the checks).
    """
    path = Path(path)
    try:
        if not path.exists():
            raise LogError(f"{path}: file not found; check the path")
        if path.is_dir() or path.suffix.lower() in BAG_SUFFIXES:
            return read_bag(scenario, path)
        if path.suffix.lower() != ".csv":
            raise LogError(
                f"{path}: not a .csv log; give a CSV log, a ROS 2 bag folder or an .mcap / .db3 file"
            )
        return read_csv(scenario, path)
    except OSError as exc:  # permissions, a vanished file, a device: the user's to fix
        raise LogError(
            f"{path}: cannot be read ({exc.strerror or exc}); check the file and its permissions"
        ) from None
