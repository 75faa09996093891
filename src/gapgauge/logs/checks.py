"""The two levels of check on a log's samples: impossible values refuse the file, unusual ones flag a channel.

*Impossible* (the file is refused with a :class:`LogError`): a non-finite sample, time not strictly
increasing, a gap beyond ``[hardware].max_gap_s``, sampling slower than ``min_rate_hz``, a joint angle
beyond the compiled model's range by more than :data:`JOINT_LIMIT_SLACK`.

*Unusual* (the trial is stored with a :class:`ChannelFlag` per channel: how many samples, the worst one and
where): a sample beyond the channel's plausible range, or a spike in a position (a joint angle, the trunk
pitch, the centre of mass, the platform: one sample that leaves both neighbours and comes back). A position
is the integral of a velocity and cannot do that within one sample period, so such a spike is the sensor's;
a force, a torque or a rate can (an impact), and so can a force-weighted point (a contact group's or the
centre of pressure, which jumps when a contact unloads), so for them the plausible range is the check.
Plausible ranges are ``[hardware.plausible]`` where the scenario sets them, otherwise taken from the
compiled model by the channel's kind: a joint angle within the joint's range, a vertical ground force
within :data:`FORCE_BODY_WEIGHTS` body weights (the body's mass from the model times the model's gravity),
a length within :data:`LENGTH_EXTENTS` times the model's extent, the trunk pitch within half a turn.
Channels of other kinds (rates, speeds, torques) have no default range.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import mujoco
import numpy as np
from scipy.stats import median_abs_deviation

from ..errors import LogError
from ..scenario import Scenario
from ..scenario.model_info import compiled, joint_angle_ranges
from ..trajectory import BODY_CHANNELS, channel_dimension
from ..units import UNITS

#: slack beyond the model's joint range before an angle counts as impossible, rad (soft limits give a little)
JOINT_LIMIT_SLACK = 0.1
#: plausible vertical ground force per sensor, in body weights: (low, high). Standing loads about one body
#: weight over the feet and a stumble or a landing several; a sensor does not pull, so a clearly negative
#: reading is an offset (common practice, no source)
FORCE_BODY_WEIGHTS = (-0.25, 5.0)
#: plausible |length| in units of the model's spatial extent (``mjModel.stat.extent``)
LENGTH_EXTENTS = 2.0
#: a spike departs from the mean of its two neighbours by more than this many robust noise sds ...
SPIKE_SIGMAS = 8.0
#: ... and by more than this fraction of the channel's spread (0.5th to 99.5th percentile) ...
SPIKE_SPREAD_FRACTION = 0.05
#: ... and by more than this fraction of the channel's largest magnitude (below any sensor's concern) ...
SPIKE_MAGNITUDE_FRACTION = 0.01
#: ... while its neighbours differ from each other by less than this fraction of the departure
SPIKE_RETURN_FRACTION = 0.5


@dataclass
class ChannelFlag:
    """Something unusual in one channel of a stored trial: never a reason to refuse it.

    Attributes:
        channel: the trajectory channel.
        kind: ``"plausible"`` (samples beyond the plausible range), ``"spike"`` (single-sample spikes) or
            ``"scale"`` (the channel's scale far from the matched simulations', see :mod:`.units_check`).
        count: samples concerned (1 for ``"scale"``).
        worst: the worst value, SI (for ``"scale"``: the ratio of the log's scale to the simulation's).
        where: location of the worst sample, e.g. ``"trial.csv:402:11"``.
        detail: one line for people.
    """

    channel: str
    kind: str
    count: int
    worst: float
    where: str
    detail: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ChannelFlag:
        return cls(str(data["channel"]), str(data["kind"]), int(data["count"]), float(data["worst"]),
                   str(data["where"]), str(data["detail"]))


# ---- limits from the model --------------------------------------------------------------------------


def body_mass(scenario: Scenario) -> float:
    """Mass of the robot in the compiled model, kg: the subtree of the body whose centre of mass is the
    whole-body one (``[model.channels]``), else every body of the kinematic trees that carry a hinge, ball or
    free joint (a support platform on a slide joint is not the robot).

    Raises:
        ScenarioError: the model does not compile.
    """
    body = compiled(scenario)
    model = body.model
    if body.body.com_body:
        return float(model.body_subtreemass[model.body(body.body.com_body).id])
    moving = {mujoco.mjtJoint.mjJNT_HINGE, mujoco.mjtJoint.mjJNT_BALL, mujoco.mjtJoint.mjJNT_FREE}
    roots = {int(model.body_rootid[model.jnt_bodyid[j]]) for j in range(model.njnt) if model.jnt_type[j] in moving}
    mass = float(sum(model.body_mass[b] for b in range(model.nbody) if int(model.body_rootid[b]) in roots))
    return mass if mass > 0 else float(mujoco.mj_getTotalmass(model))


def body_weight(scenario: Scenario) -> float:
    """The robot's weight in the model, N: :func:`body_mass` times the model's gravity."""
    return body_mass(scenario) * float(np.linalg.norm(compiled(scenario).model.opt.gravity))


def platform_servo(scenario: Scenario) -> tuple[float, float, float] | None:
    """``(kp N/m, kv N s/m, mass kg)`` of the position servo that drives the model's support platform (the
    actuator on a joint of the platform body: MuJoCo's ``gainprm[0]`` and ``-biasprm[2]``), or None."""
    body = compiled(scenario)
    model, name = body.model, body.body.platform
    if not name:
        return None
    pid = model.body(name).id
    for a in range(model.nu):
        on_joint = model.actuator_trntype[a] == mujoco.mjtTrn.mjTRN_JOINT
        if on_joint and model.jnt_bodyid[model.actuator_trnid[a, 0]] == pid:
            kp, kv = float(model.actuator_gainprm[a, 0]), float(-model.actuator_biasprm[a, 2])
            if kp > 0 and kv >= 0:
                return kp, kv, float(model.body_subtreemass[pid])
    return None


def joint_limits(scenario: Scenario) -> dict[str, tuple[float, float]]:
    """Angle channel ``<joint>_angle`` -> (low, high) rad beyond which an angle is impossible: the compiled
    model's range of every limited actuated joint (:func:`gapgauge.scenario.model_info.joint_angle_ranges`,
    radians whatever ``<compiler angle>`` says) widened by :data:`JOINT_LIMIT_SLACK`, as a soft limit gives a
    little."""
    return {channel: (lo - JOINT_LIMIT_SLACK, hi + JOINT_LIMIT_SLACK)
            for channel, (lo, hi) in joint_angle_ranges(scenario).items()}


def plausible_limits(scenario: Scenario, channels: list[str]) -> dict[str, tuple[float, float, str]]:
    """Channel -> (low, high, where the range comes from), SI, for the ``channels`` that have one (module
    docstring). ``[hardware.plausible]`` wins over the model's defaults.

    Raises:
        ScenarioError: the model does not compile.
    """
    model = compiled(scenario).model
    joints = joint_angle_ranges(scenario)
    weight = body_weight(scenario)
    out: dict[str, tuple[float, float, str]] = {}
    for channel in channels:
        if channel in scenario.hardware.plausible:
            lo, hi = scenario.hardware.plausible[channel]
            out[channel] = (lo, hi, "the plausible range of [hardware.plausible]")
            continue
        try:
            kind = channel_dimension(channel)
        except KeyError:
            continue
        if channel in joints:
            out[channel] = (*joints[channel], "the model's joint range")
        elif kind == "angle" and channel == "trunk_pitch":
            out[channel] = (-math.pi, math.pi, "half a turn either way")
        elif kind == "force" and weight > 0:
            lo, hi = FORCE_BODY_WEIGHTS
            out[channel] = (lo * weight, hi * weight, f"{lo:g} to {hi:g} body weights ({weight:.4g} N)")
        elif kind == "length":
            reach = LENGTH_EXTENTS * float(model.stat.extent)
            out[channel] = (-reach, reach, f"{LENGTH_EXTENTS:g} times the model's extent")
    return out


# ---- impossible: refuse ----------------------------------------------------------------------------------


def check_time(scenario: Scenario, s: Any) -> None:
    """Refuse a stream whose time ``s.t (n,) s`` is non-finite, not increasing, gapped or too slow."""
    hw = scenario.hardware
    t = s.t
    label = s.labels.get("time", "time")
    check_finite(s, "time", t)
    if len(t) < 2:
        raise LogError(f"{s.locate(0)}: only one sample; a trial needs its samples over the whole disturbance")
    dt = np.diff(t)
    bad = np.flatnonzero(dt <= 0)
    if bad.size:
        i = int(bad[0]) + 1
        if dt[i - 1] == 0:
            raise LogError(
                f"{s.locate_cell(i, 'time')}: time {t[i]:g} s repeats the previous sample's; "
                f"remove the duplicated sample (column {label!r})" + s.time_hint
            )
        raise LogError(
            f"{s.locate_cell(i, 'time')}: time goes backwards ({t[i - 1]:g} s then {t[i]:g} s); "
            "sort the samples by time or check the logger's clock" + s.time_hint
        )
    gap = int(np.argmax(dt))
    if dt[gap] > hw.max_gap_s:
        raise LogError(
            f"{s.locate_cell(gap + 1, 'time')}: gap of {dt[gap]:.4g} s since the previous sample, longer "
            f"than max_gap_s = {hw.max_gap_s:g} s; samples were lost there: repeat the trial "
            "or raise [hardware].max_gap_s"
        )
    rate = 1.0 / float(np.median(dt))
    if rate < hw.min_rate_hz:
        raise LogError(
            f"{s.locate(0)}: sampled at {rate:.4g} Hz, slower than min_rate_hz = {hw.min_rate_hz:g} Hz "
            f"that the features need; log faster (the scenario expects {hw.sample_rate_hz:g} Hz)"
            + _time_unit_hint(s, rate, hw.min_rate_hz)
        )


def _time_unit_hint(s: Any, rate: float, min_rate: float) -> str:
    unit = s.units.get("time")
    if unit not in UNITS:
        return ""
    for other, (dim, fac) in UNITS.items():
        if dim == "time" and other != unit and rate * UNITS[unit][1] / fac >= min_rate:
            return f" (or is the time column in {other}, not {unit}?)"
    return ""


def check_finite(s: Any, channel: str, values: np.ndarray) -> None:
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = int(bad[0])
        raise LogError(
            f"{s.locate_cell(i, channel)}: {values[i]} in {s.labels.get(channel, channel)!r} is not a "
            "finite number; remove or repair samples with NaN or inf"
        )


def check_joint_limit(s: Any, channel: str, values: np.ndarray, limits: tuple[float, float]) -> None:
    """Refuse an angle beyond the joint's mechanical range (plus slack), with a unit hint."""
    low, high = limits
    bad = np.flatnonzero((values < low) | (values > high))
    if not bad.size:
        return
    i = int(bad[0])
    unit = s.units.get(channel, "")
    scale = UNITS[unit][1] if unit in UNITS else 1.0
    raise LogError(
        f"{s.locate_cell(i, channel)}: {values[i] / scale:.6g} {unit} in {s.labels.get(channel, channel)!r} is "
        f"beyond the model's joint range widened by {JOINT_LIMIT_SLACK:g} rad "
        f"[{low / scale:.6g}, {high / scale:.6g}] {unit}, which no joint can reach"
        + _unit_hint(s, channel, unit, values / scale, low, high)
    )


def _unit_hint(s: Any, channel: str, unit: str, raw: np.ndarray, low: float, high: float) -> str:
    """Suggest another unit of the same dimension under which every raw value would be possible."""
    dim = channel_dimension(channel)
    for other, (odim, fac) in UNITS.items():
        if odim == dim and other != unit:
            si = raw * fac
            if np.all((si >= low) & (si <= high)):
                return (f"; the values look like {other}, not {unit}: "
                        f'set unit = "{other}" for {channel} in {s.table}')
    return f"; check the sensor and the unit declared in {s.table}"


# ---- unusual: flag --------------------------------------------------------------------------------------------


def unusual(s: Any, channel: str, values: np.ndarray, limits: tuple[float, float, str] | None) -> list[ChannelFlag]:
    """Flags for one channel of a stream (``values (n,)`` SI): samples beyond ``limits``, and spikes."""
    flags = []
    unit = s.units.get(channel, "")
    scale = UNITS[unit][1] if unit in UNITS else 1.0
    if limits is not None:
        low, high, why = limits
        beyond = np.flatnonzero((values < low) | (values > high))
        if beyond.size:
            excess = np.maximum(low - values[beyond], values[beyond] - high)
            i = int(beyond[np.argmax(excess)])
            flags.append(ChannelFlag(
                channel, "plausible", int(beyond.size), float(values[i]), s.locate_cell(i, channel),
                f"{channel}: {beyond.size} sample(s) beyond {why} [{low / scale:.4g}, {high / scale:.4g}] {unit}, "
                f"worst {values[i] / scale:.5g} {unit} at {s.locate_cell(i, channel)}",
            ))
    spikes = spike_indices(values) if is_position(channel) else np.zeros(0, dtype=int)
    if spikes.size:
        departure = np.abs(values[spikes] - 0.5 * (values[spikes - 1] + values[spikes + 1]))
        i = int(spikes[np.argmax(departure)])
        flags.append(ChannelFlag(
            channel, "spike", int(spikes.size), float(values[i]), s.locate_cell(i, channel),
            f"{channel}: {spikes.size} single-sample spike(s), worst {values[i] / scale:.5g} {unit} at "
            f"{s.locate_cell(i, channel)}",
        ))
    return flags


def is_position(channel: str) -> bool:
    """A channel that cannot spike physically (module docstring): an angle, or a length of the body as a whole
    other than the centre of pressure (contact groups' positions are force-weighted too)."""
    try:
        kind = channel_dimension(channel)
    except KeyError:
        return False
    return kind == "angle" or (kind == "length" and channel in BODY_CHANNELS and not channel.startswith("cop_"))


def spike_indices(x: np.ndarray) -> np.ndarray:
    """Indices ``k`` (interior samples) where ``x (n,)`` spikes: ``r_k = x_k - (x_{k-1} + x_{k+1}) / 2`` exceeds
    :data:`SPIKE_SIGMAS` robust sds of ``r`` (median absolute deviation scaled to a normal sd,
    ``scipy.stats.median_abs_deviation(scale="normal")``), :data:`SPIKE_SPREAD_FRACTION` of the channel's
    spread and :data:`SPIKE_MAGNITUDE_FRACTION` of its largest magnitude, while ``|x_{k+1} - x_{k-1}|`` stays
    below :data:`SPIKE_RETURN_FRACTION` of ``|r_k|``: the sample leaves its neighbours and the signal comes
    back (an impact that stays is not a spike)."""
    if x.size < 5:
        return np.zeros(0, dtype=int)
    signed = x[1:-1] - 0.5 * (x[:-2] + x[2:])
    r = np.abs(signed)
    sd = float(median_abs_deviation(signed, scale="normal"))
    low, high = np.percentile(x, [0.5, 99.5])
    floor = max(SPIKE_SIGMAS * sd, SPIKE_SPREAD_FRACTION * float(high - low),
                SPIKE_MAGNITUDE_FRACTION * float(np.max(np.abs(x))))
    back = np.abs(x[2:] - x[:-2]) < SPIKE_RETURN_FRACTION * r
    return np.flatnonzero((r > floor) & back & (r > 0)) + 1
