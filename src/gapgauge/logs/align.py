"""When did the disturbance begin on the log's clock? Placing a trial in time, and estimating the onset.

Simulated features are measured from the disturbance onset (``[task].onset`` on the scenario's clock), so
a log must be put on that clock. In order of preference (:func:`align`):

1. the sidecar's ``disturbance_at`` (the onset, s on the log's clock) or ``trial_start_at`` (the
   scenario's zero on the log's clock);
2. the sidecar's ``trigger``: a column or topic that marks the disturbance (:func:`onset_from_trigger`);
3. otherwise the onset estimated from the log itself (:func:`estimate_onset`): for a push, the step in the
   centre-of-mass acceleration it causes (Newton: a force F on a body of mass M changes the acceleration
   of its centre of mass by F / M at once), seen as a kink in ``com_vx``; for a platform, the platform's
   (or the feet's) minimum-jerk travel of ``[task].duration``.

A CSV log's own clock is the scenario's by contract (seconds since the trial started); without (1) or (2)
the estimate checks it, and wins only when the two disagree. A bag has no such contract: without (1) or (2)
its time is the estimated onset's, and when the onset cannot be placed within ``[hardware].onset_tolerance_s``
the trial is kept on the time of its first message, marked not placed (left out of the shift, with the
reason), never silently.

The estimate is a least-squares fit of a change-point model with the onset profiled on a fine grid; its
uncertainty is the half-width of the profile-likelihood interval
``{tau: SSE(tau) <= SSE_min (1 + F_{0.95}(1, n - p) / (n - p))}`` (Bates and Watts 1988, Nonlinear
Regression Analysis and its Applications, section 6.1; for change points, Hinkley 1969, Biometrika 56:495).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy import signal, stats

#: the estimate's search: the coarse detector must exceed this many noise sds ...
DETECT_SIGMAS = 6.0
#: ... with a push's change of acceleration between these multiples of the expected F / M (the body's mass and
#: the push may differ from the model's; the controller starts to resist at once) ...
PUSH_CHANGE_RANGE = (0.5, 2.0)
#: ... or a platform travel between these multiples of the commanded one (the feet ride on the platform; a
#: fall's sliding feet travel further or less, and come later)
PLATFORM_TRAVEL_RANGE = (0.7, 1.4)
#: push: seconds of the centre-of-mass velocity fitted before and after the onset (the push acts alone at
#: first; the controller's reaction and the push's end come later)
PUSH_BEFORE_S, PUSH_AFTER_S = 0.1, 0.04
#: platform: seconds fitted before the travel starts and after it ends
PLATFORM_MARGIN_S = 0.1
#: the onset is profiled on a grid this many times finer than the sample period
GRID_REFINEMENT = 10
CONFIDENCE = 0.95
#: how many times the fit window may move after an onset found on its edge
WALK_STEPS = 4
#: residual autocorrelation beyond this is taken as this (the widening stays finite)
MAX_AUTOCORRELATION = 0.99


@dataclass
class Onset:
    """An onset found in a log: ``time`` (s, log clock relative to its first sample), ``uncertainty`` (s,
    half-width of the 95% interval), the channel it came from, or why it could not be found."""

    time: float
    uncertainty: float
    channel: str
    reason: str = ""

    @property
    def found(self) -> bool:
        return math.isfinite(self.time)


def not_found(reason: str, channel: str = "") -> Onset:
    return Onset(math.nan, math.nan, channel, reason)


@dataclass
class Alignment:
    """How a trial was put on the scenario's clock: scenario time = log time - ``shift``.

    Attributes:
        source: ``"disturbance_at"``, ``"trial_start_at"``, ``"trigger"``, ``"estimate"``, ``"log_clock"``
            (a CSV's own clock, by contract) or ``"first_message"`` (nothing placed the trial).
        placed: False when the onset could not be placed within the tolerance (the trial is left out of the
            shift assessment).
        onset_log_s: the onset on the log's clock, s (NaN when not placed).
        uncertainty_s: of the onset, s (0 when stated).
        shift_s: subtracted from the log's clock, s.
        estimate_s, estimate_uncertainty_s, estimate_channel: the onset estimated from the log (NaN if none).
        reason: why not placed, or what was noticed (e.g. the clock disagreed with the estimate).
        channel: the trigger or the channel that placed the onset ("" when stated or by the clock).
    """

    source: str
    placed: bool
    onset_log_s: float
    uncertainty_s: float
    shift_s: float
    estimate_s: float = math.nan
    estimate_uncertainty_s: float = math.nan
    estimate_channel: str = ""
    reason: str = ""
    channel: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Alignment:
        def num(key: str) -> float:
            value = data.get(key)
            return math.nan if value is None else float(value)

        return cls(str(data["source"]), bool(data["placed"]), num("onset_log_s"), num("uncertainty_s"),
                   num("shift_s"), num("estimate_s"), num("estimate_uncertainty_s"),
                   str(data.get("estimate_channel", "")), str(data.get("reason", "")), str(data.get("channel", "")))

    @property
    def detail(self) -> str:
        """One line for people."""
        if not self.placed:
            return f"onset not placed ({self.reason}); time counted from the first sample"
        if self.source in ("disturbance_at", "trial_start_at"):
            text = f"onset {self.onset_log_s:.6g} s on the log's clock (sidecar {self.source})"
        elif self.source == "trigger":
            text = f"onset {self.onset_log_s:.6g} s from the trigger {self.channel} (+- {self.uncertainty_s:.2g} s)"
        elif self.source == "estimate":
            text = (f"onset estimated at {self.onset_log_s:.6g} s on the log's clock from {self.channel} "
                    f"(+- {self.uncertainty_s:.2g} s)")
        else:
            text = "the log's clock is the scenario's"
        return text + (f"; {self.reason}" if self.reason else "")


# ---- the trigger ---------------------------------------------------------------------------------------


def onset_from_trigger(t: np.ndarray, values: np.ndarray | None, label: str) -> Onset:
    """The first sample of a trigger past half its range (``values (n,)`` at ``t (n,) s``), or the first
    message of a topic without a field (``values`` None). Uncertainty: the interval since the previous sample."""
    if t.size == 0:
        return not_found(f"the trigger {label} has no samples", label)
    if values is None:
        return Onset(float(t[0]), 0.0, label)
    departure = np.abs(values - values[0])
    span = float(departure.max())
    if not span > 0:
        return not_found(f"the trigger {label} never changes", label)
    k = int(np.argmax(departure > 0.5 * span))
    return Onset(float(t[k]), float(t[k] - t[k - 1]) if k > 0 else 0.0, label)


# ---- estimating the onset ---------------------------------------------------------------------------------


def minimum_jerk(s: np.ndarray) -> np.ndarray:
    """Minimum-jerk travel profile ``10 s^3 - 15 s^4 + 6 s^5`` of ``s`` clipped to [0, 1] (Flash and Hogan
    1985, J. Neurosci. 5:1688): the platform's motion in the simulation."""
    s = np.clip(s, 0.0, 1.0)
    return s**3 * (10.0 - 15.0 * s + 6.0 * s * s)


def noise_sd(y: np.ndarray) -> float:
    """Robust sd of white noise on a smooth signal: MAD of the second differences (variance 6 sd^2)."""
    d2 = np.diff(y, 2)
    return float(stats.median_abs_deviation(d2, scale="normal")) / math.sqrt(6.0) if d2.size else 0.0


def servo_response(duration: float, servo: tuple[float, float, float] | None, step: float) -> Any:
    """The platform's travel (fraction of the commanded) ``u`` seconds after its command starts, as a function
    of ``u (m,)``: the minimum-jerk command itself, or with ``servo = (kp N/m, kv N s/m, mass kg)`` the
    command through that position servo, ``m x'' + kv x' + kp x = kp u`` (``scipy.signal.lsim``; a stiff
    servo trails a slow command by about ``kv / kp`` s), computed on a grid of ``step`` s."""
    if servo is None:
        return lambda u: minimum_jerk(u / duration)
    kp, kv, mass = servo
    settle = duration + 10.0 * max(kv / kp, math.sqrt(mass / kp))
    grid = np.arange(0.0, settle + step, step)
    _, x, _ = signal.lsim(([kp], [mass, kv, kp]), minimum_jerk(grid / duration), grid)
    return lambda u: np.interp(u, grid, x, left=0.0, right=float(x[-1]))


def estimate_onset(t: np.ndarray, channels: dict[str, np.ndarray], task: Any, body_mass: float,
                   platform_servo: tuple[float, float, float] | None = None) -> Onset:
    """The disturbance onset estimated from a log on a uniform time base (module docstring).

    Args:
        t: ``(n,)`` s, uniform, on the log's clock (relative).
        channels: channel -> ``(n,)`` SI, unfiltered.
        task: the scenario's task (``kind``, ``duration``, ``magnitude``).
        body_mass: kg, for the expected change of acceleration of a push.
        platform_servo: ``(kp N/m, kv N s/m, mass kg)`` of the position servo that drives the platform in the
            model, or None: the measured travel is then taken to follow the command (see :func:`servo_response`).
    """
    if t.size < 10:
        return not_found("too few samples")
    if task.kind == "push":
        if "com_vx" not in channels:
            return not_found("a push is placed from com_vx, which the log does not map")
        if not body_mass > 0 or task.magnitude == 0:
            return not_found("no push to look for (zero magnitude or mass)")
        return _push_onset(t, channels["com_vx"], task.magnitude / body_mass)
    feet = [c for c in channels if c.endswith("_x") and c not in ("com_x", "cop_x", "platform_x")]
    if "platform_x" in channels:
        name, y = "platform_x", channels["platform_x"]
    elif feet:
        name, y = "+".join(feet), np.mean([channels[c] for c in feet], axis=0)
    else:
        return not_found("a platform move is placed from platform_x or the feet's positions, which the log lacks")
    if task.magnitude == 0 or not task.duration > 0:
        return not_found("no platform travel to look for")
    h = float(t[1] - t[0])
    shape = servo_response(task.duration, platform_servo, h / GRID_REFINEMENT)
    lag = 0.0 if platform_servo is None else 3.0 * platform_servo[1] / platform_servo[0]
    return _platform_onset(t, y, name, shape, task.duration + lag, task.magnitude)


def _push_onset(t: np.ndarray, v: np.ndarray, change: float) -> Onset:
    """Kink of ``v (n,)`` (com_vx, m/s): a line before, a line of slope ``+change`` m/s^2 more after."""
    h = float(t[1] - t[0])
    mb, ma = max(int(round(PUSH_BEFORE_S / h)), 3), max(int(round(PUSH_AFTER_S / h)), 3)
    if t.size < mb + ma + 2:
        return not_found("the log is shorter than the push's fit window", "com_vx")
    sd = noise_sd(v)

    def slope_kernel(m: int) -> tuple[np.ndarray, float]:
        i = np.arange(m + 1) - m / 2.0
        ss = float(np.sum(i * i)) * h * h
        return i * h / ss, ss

    kb, sb = slope_kernel(mb)
    ka, sa = slope_kernel(ma)
    left = np.correlate(v, kb, "valid")  # left[j]: slope over samples j .. j + mb
    right = np.correlate(v, ka, "valid")  # right[j]: slope over samples j .. j + ma
    k = np.arange(mb, t.size - ma)  # candidate onsets: the kink at sample k
    delta = right[k] - left[k - mb]
    z = delta * np.sign(change) / (max(sd, 1e-12) * math.sqrt(1.0 / sb + 1.0 / sa))
    ratio = delta / change
    candidates = (z > DETECT_SIGMAS) & (ratio > PUSH_CHANGE_RANGE[0]) & (ratio < PUSH_CHANGE_RANGE[1])
    if not candidates.any():
        return not_found("no step of the centre-of-mass acceleration like the push's in com_vx", "com_vx")
    kc = int(k[_first_peak(z, candidates)])

    def design(tau: float, tw: np.ndarray) -> np.ndarray:
        u = tw - tau
        return np.column_stack([np.ones_like(u), u, np.maximum(u, 0.0)])

    return _walk(t, v, design, kc, mb, ma + 1, ma // 2, "com_vx")


def _platform_onset(t: np.ndarray, y: np.ndarray, name: str, shape: Any, span: float, travel: float) -> Onset:
    """Start of the platform's command in ``y (n,)`` m (the platform or the feet), whose travel ``shape(u)``
    (fraction of ``travel``, ``u`` s after the command starts) lasts about ``span`` s."""
    h = float(t[1] - t[0])
    margin = max(int(round(PLATFORM_MARGIN_S / h)), 3)
    m = int(round(span / h))
    width = margin + m + margin
    if t.size < width + 2:
        return not_found("the log is shorter than the platform move's fit window", name)
    g = shape((np.arange(width) - margin) * h)
    g = g - g.mean()
    gg = float(np.sum(g * g))
    amplitude = np.correlate(y, g / gg, "valid")  # amplitude[j]: travel fitted with the move starting at j + margin
    z = amplitude * np.sign(travel) / (max(noise_sd(y), 1e-12) / math.sqrt(gg))
    ratio = amplitude / travel
    candidates = (z > DETECT_SIGMAS) & (ratio > PLATFORM_TRAVEL_RANGE[0]) & (ratio < PLATFORM_TRAVEL_RANGE[1])
    if not candidates.any():
        return not_found(f"no travel like the platform's in {name}", name)
    j = _first_peak(z, candidates)
    def design(tau: float, tw: np.ndarray) -> np.ndarray:
        return np.column_stack([np.ones_like(tw), shape(tw - tau)])

    return _walk(t, y, design, j + margin, margin, width - margin, margin // 2, name)


def _first_peak(z: np.ndarray, candidates: np.ndarray) -> int:
    """Index of the disturbance among the candidates: the peak of ``z`` in their first run (a fall, whose
    motion may look alike, comes after the disturbance)."""
    start = int(np.argmax(candidates))
    stop = start + int(np.argmin(candidates[start:])) if not candidates[start:].all() else candidates.size
    return start + int(np.argmax(z[start:stop]))


def _walk(t: np.ndarray, y: np.ndarray, design: Any, kc: int, before: int, after: int, reach: int,
          channel: str) -> Onset:
    """:func:`_profile` on samples ``kc - before .. kc + after`` with the onset within ``reach`` samples of
    sample ``kc``; when the best onset lies on an edge of that reach (the coarse detector peaked at a later
    or earlier part of the response), the window moves that way, :data:`WALK_STEPS` times at most."""
    h = float(t[1] - t[0])
    for _ in range(WALK_STEPS):
        lo, hi = kc - before, kc + after
        if lo < 0 or hi > t.size:
            break
        onset, side = _profile(t[lo:hi], y[lo:hi], design, float(t[kc]), reach * h, h, channel)
        if side == 0:
            return onset
        kc += side * reach
    return not_found(f"the onset in {channel} is not bounded within the fit window", channel)


def _profile(tw: np.ndarray, yw: np.ndarray, design: Any, centre: float, reach: float, h: float,
             channel: str) -> tuple[Onset, int]:
    """Least squares of ``yw`` on ``design(tau, tw)`` with ``tau`` profiled over ``centre +- reach`` on a grid of
    ``h / GRID_REFINEMENT``; the onset and the half-width of its profile-likelihood interval, and 0 (or the
    side, -1 or +1, whose edge the interval reaches: then the onset is not bounded here)."""
    taus = centre + np.arange(-reach, reach + h / (2 * GRID_REFINEMENT), h / GRID_REFINEMENT)
    sse = np.empty(taus.size)
    for i, tau in enumerate(taus):
        x = design(float(tau), tw)
        coef, *_ = np.linalg.lstsq(x, yw, rcond=None)
        sse[i] = float(np.sum((yw - x @ coef) ** 2))
    n, p = tw.size, design(centre, tw).shape[1] + 1
    best = int(np.argmin(sse))
    inside = sse <= sse[best] * (1.0 + stats.f.ppf(CONFIDENCE, 1, n - p) / (n - p))
    if inside[0] or inside[-1]:
        return not_found(f"the onset in {channel} is not bounded", channel), (-1 if inside[0] else 1)
    x = design(float(taus[best]), tw)
    coef, *_ = np.linalg.lstsq(x, yw, rcond=None)
    residual = yw - x @ coef
    # residuals that follow each other (the model misses part of the motion) carry less information than
    # white noise: widen by sqrt((1 + rho) / (1 - rho)), rho their lag-one autocorrelation (the effective
    # sample size of an AR(1) series, Bretherton et al. 1999, J. Climate 12:1990, eq. 31)
    rho = float(np.corrcoef(residual[:-1], residual[1:])[0, 1]) if np.std(residual) > 0 else 0.0
    rho = min(max(rho, 0.0), MAX_AUTOCORRELATION) if math.isfinite(rho) else MAX_AUTOCORRELATION
    half = float(np.max(np.abs(taus[inside] - taus[best]))) * math.sqrt((1 + rho) / (1 - rho))
    return Onset(float(taus[best]), half + h / GRID_REFINEMENT, channel), 0


# ---- the decision --------------------------------------------------------------------------------------


def align(
    *,
    stated: tuple[str, float] | None,
    trigger: Onset | None,
    estimate: Onset,
    log_clock_is_scenario: bool,
    task_onset: float,
    tolerance: float,
    period: float,
    origin: float = 0.0,
) -> Alignment:
    """Put a log on the scenario's clock (module docstring for the order of preference).

    Args:
        stated: ``(sidecar key, onset s)`` from ``disturbance_at`` / ``trial_start_at``, relative to ``origin``.
        trigger: the onset found from the sidecar's trigger, or None when the sidecar names none.
        estimate: the onset estimated from the log (found or not).
        log_clock_is_scenario: a CSV, whose clock is the scenario's by contract; False for a bag.
        task_onset: ``[task].onset``, s. tolerance: ``[hardware].onset_tolerance_s``. period: the sample
            period, s. origin: the log-clock time of the log's first sample (a bag's first stamp), s; every
            other time argument is relative to it.
    """
    extra = {"estimate_s": estimate.time + origin, "estimate_uncertainty_s": estimate.uncertainty,
             "estimate_channel": estimate.channel}

    def disagree(onset: float) -> bool:
        return estimate.found and abs(estimate.time - onset) > 2 * estimate.uncertainty + period

    def placed(source: str, onset: float, uncertainty: float, reason: str = "", channel: str = "") -> Alignment:
        return Alignment(source, True, onset + origin, uncertainty, onset - task_onset + origin, **extra,
                         reason=reason, channel=channel)

    def unplaced(source: str, reason: str) -> Alignment:
        return Alignment(source, False, math.nan, math.nan, origin, **extra, reason=reason)

    suggests = (f"the log itself suggests {estimate.time + origin:.6g} +- {estimate.uncertainty:.2g} s "
                f"(from {estimate.channel})")
    if stated is not None:
        key, onset = stated
        return placed(key, onset, 0.0, f"check the sidecar: {suggests}" if disagree(onset) else "")
    if trigger is not None:
        if not trigger.found:
            return unplaced("trigger", trigger.reason)
        if trigger.uncertainty > tolerance:
            return unplaced("trigger", f"the trigger {trigger.channel} places the onset only to +- "
                                       f"{trigger.uncertainty:.2g} s, more than onset_tolerance_s = {tolerance:g} s")
        reason = f"check the trigger: {suggests}" if disagree(trigger.time) else ""
        return placed("trigger", trigger.time, trigger.uncertainty, reason, trigger.channel)
    usable = estimate.found and estimate.uncertainty <= tolerance
    if log_clock_is_scenario:
        if usable and disagree(task_onset):
            return placed("estimate", estimate.time, estimate.uncertainty,
                          f"the log's clock is {estimate.time - task_onset:+.4g} s off the scenario's "
                          "(its onset estimated from the log)", estimate.channel)
        if usable:
            return placed("log_clock", task_onset, 0.0)
        why = estimate.reason or f"estimated only to +- {estimate.uncertainty:.2g} s"
        return placed("log_clock", task_onset, 0.0, f"the onset could not be checked from the log ({why})")
    if usable:
        return placed("estimate", estimate.time, estimate.uncertainty, channel=estimate.channel)
    if estimate.found:
        return unplaced("first_message", f"the onset estimated from {estimate.channel} is uncertain by +- "
                        f"{estimate.uncertainty:.2g} s, more than onset_tolerance_s = {tolerance:g} s; "
                        "give disturbance_at, trial_start_at or a trigger in the sidecar")
    return unplaced("first_message", f"{estimate.reason}; give disturbance_at, trial_start_at or a trigger in the "
                                     "sidecar")
