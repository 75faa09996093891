"""The stand-in robot: the scenario's model with a perturbation profile, writing synthetic hardware logs.

No robot is attached to this project's machines (DESIGN.md section 6). The stand-in simulates the
requested parameter sets on perturbed physics, then corrupts what a logger would see and writes logs
in exactly the hardware contract of :mod:`gapgauge.logs`: the scenario's column names and units
(e.g. degrees and millimetres), a sidecar JSON with ``"synthetic": true`` and a note that says so. It
serves the demo, the tests and the benchmarks.

A profile (TOML, ``scenarios/standin/*.toml``)::

    name = "heavy_slippery"
    description = "..."
    robot_id = "standin-heavy-slippery"

    [physics]            # fixed values; quantities not named keep the scenario's nominal
    trunk_mass_scale = 1.15
    friction = 0.6

    [noise]              # sensor noise sd in SI, by channel kind (angle, angular_rate, torque, force,
    angle = 0.002        # length, speed) or by channel name (a name overrides its kind)

    [bias]               # constant sensor offset in SI, by channel kind or name
    ankle_angle = 0.01

    [logging]
    rate_hz = 500.0            # logging rate
    jitter_s = 0.0002          # sd of the sampling instants around k / rate_hz (clipped to 0.4 / rate_hz)
    drop_probability = 0.002   # chance that a sample is lost (never the first or last)

Corruption of log ``i`` draws from ``numpy.random.default_rng([seed, i])``, so the CSVs are reproducible
from the seed (the sidecar's ``recorded_at`` is the time of writing).
"""

from __future__ import annotations

import csv
import json
import math
import sys
import warnings
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import qmc

from ..errors import GapgaugeError, ScenarioError
from ..scenario import PHYSICS_NAMES, Scenario, load_scenario
from ..trajectory import CHANNELS, channel_dimension
from ..units import UNITS, factor
from .rollout import simulate

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

KINDS = tuple(sorted({dim for dim, _ in CHANNELS.values()}))
MAX_PROFILE_BYTES = 100_000
MAX_PARAMS_BYTES = 10_000_000
MAX_LOGS = 10_000
#: the sampling instants move at most this fraction of a period, so the logged time stays increasing
MAX_JITTER_FRACTION = 0.4
#: significant digits written per number: far below any sensor's resolution
DIGITS = 10


@dataclass(frozen=True)
class StandinProfile:
    """A perturbation profile (see the module docstring). Noise and bias are SI, by channel name."""

    name: str
    path: Path
    description: str
    robot_id: str
    physics: dict[str, float]
    noise: dict[str, float]
    bias: dict[str, float]
    rate_hz: float
    jitter_s: float
    drop_probability: float

    def physics_row(self, scenario: Scenario) -> np.ndarray:
        """``(k,)`` physics in ``[physics]`` order: the scenario's nominal, overridden by the profile."""
        return np.array([self.physics.get(r.name, r.nominal) for r in scenario.physics], dtype=float)

    def noise_sd(self, channel: str) -> float:
        return self.noise.get(channel, self.noise.get(channel_dimension(channel), 0.0))

    def bias_of(self, channel: str) -> float:
        return self.bias.get(channel, self.bias.get(channel_dimension(channel), 0.0))


def load_profile(path: str | Path, scenario: Scenario) -> StandinProfile:
    """Load and validate a stand-in profile; a :class:`ScenarioError` naming the key for anything wrong."""
    path = Path(path)
    if not path.is_file():
        raise ScenarioError(
            f"{path}: profile not found; give a stand-in profile .toml (see scenarios/standin/)"
        )
    if path.stat().st_size > MAX_PROFILE_BYTES:
        raise ScenarioError(f"{path}: more than {MAX_PROFILE_BYTES} bytes; a profile is a few lines")
    try:
        data = tomllib.loads(path.read_bytes().decode("utf-8"))
    except UnicodeDecodeError:
        raise ScenarioError(f"{path}: not UTF-8 text; save the profile as UTF-8 TOML") from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{path}: not valid TOML ({exc}); fix the syntax there") from None

    def fail(key: str, problem: str, fix: str) -> ScenarioError:
        return ScenarioError(f"{path}: key '{key}': {problem}; {fix}")

    def number(table: dict, key: str, prefix: str, low: float = 0.0, default: Any = ...) -> float:
        value = table.get(key, default)
        if value is ...:
            raise fail(f"{prefix}{key}", "is missing", "add it")
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise fail(f"{prefix}{key}", f"must be a finite number, got {value!r}", "give a number")
        if value < low:
            raise fail(f"{prefix}{key}", f"must be at least {low}, got {value}", "give a larger value")
        return float(value)

    def table(key: str) -> dict:
        value = data.get(key, {})
        if not isinstance(value, dict):
            raise fail(key, "must be a table", f"write it as [{key}]")
        return value

    known = {"name", "description", "robot_id", "physics", "noise", "bias", "logging"}
    for key in data:
        if key not in known:
            raise fail(key, "is not a known key", f"use {', '.join(sorted(known))}")
    name = data.get("name", path.stem)
    robot_id = data.get("robot_id", f"standin-{name}")
    description = data.get("description", "")
    for key, value in (("name", name), ("robot_id", robot_id), ("description", description)):
        if not isinstance(value, str) or (key != "description" and not value.strip()):
            raise fail(key, f"must be a non-empty string, got {value!r}", "give text")
    physics = {}
    for key in table("physics"):
        if key not in PHYSICS_NAMES or key not in [r.name for r in scenario.physics]:
            raise fail(
                f"physics.{key}",
                "is not a physical quantity of the scenario",
                f"use names from: {', '.join(r.name for r in scenario.physics)}",
            )
        physics[key] = number(table("physics"), key, "physics.")
    for key in ("trunk_mass_scale", "friction", "servo_strength"):
        if key in physics and physics[key] <= 0:
            raise fail(f"physics.{key}", "must be positive", "give a value above 0")
    sd, bias = {}, {}
    for section, out, low in (("noise", sd, 0.0), ("bias", bias, -math.inf)):
        for key in table(section):
            if key not in KINDS and key not in scenario.channels:
                raise fail(
                    f"{section}.{key}",
                    "is neither a channel kind nor a channel",
                    f"use a kind ({', '.join(KINDS)}) or a channel name",
                )
            out[key] = number(table(section), key, f"{section}.", low=low)
    logging = table("logging")
    for key in logging:
        if key not in ("rate_hz", "jitter_s", "drop_probability"):
            raise fail(f"logging.{key}", "is not a known key", "use rate_hz, jitter_s, drop_probability")
    rate = number(logging, "rate_hz", "logging.", default=scenario.hardware.sample_rate_hz)
    if rate < scenario.hardware.min_rate_hz:
        raise fail(
            "logging.rate_hz",
            f"{rate} Hz is below the scenario's min_rate_hz "
            f"({scenario.hardware.min_rate_hz} Hz), so its logs would be refused",
            "log faster",
        )
    jitter = number(logging, "jitter_s", "logging.", default=0.0)
    drop = number(logging, "drop_probability", "logging.", default=0.0)
    if drop >= 0.5:
        raise fail("logging.drop_probability", f"{drop} loses most samples", "use a probability below 0.5")
    return StandinProfile(name, path, description, robot_id, physics, sd, bias, rate, jitter, drop)


def load_params_file(path: str | Path) -> list[dict[str, float]]:
    """Parameter sets from JSON: the ``propose`` output ``{"proposals": [{"params": {...}}, ...]}`` or a
    plain list of ``{name: value}`` objects."""
    path = Path(path)
    if not path.is_file():
        raise ScenarioError(f"{path}: file not found; give a JSON file of parameter sets")
    if path.stat().st_size > MAX_PARAMS_BYTES:
        raise ScenarioError(f"{path}: more than {MAX_PARAMS_BYTES} bytes; give a list of parameter sets")
    try:
        data = json.loads(path.read_bytes().decode("utf-8"))
    except UnicodeDecodeError:
        raise ScenarioError(f"{path}: not UTF-8 text; save it as UTF-8 JSON") from None
    except json.JSONDecodeError as exc:
        raise ScenarioError(
            f"{path}:{exc.lineno}:{exc.colno}: not valid JSON ({exc.msg}); fix it there"
        ) from None
    except (RecursionError, ValueError):
        raise ScenarioError(
            f"{path}: JSON nested too deeply or holds an unusable number; give plain sets"
        ) from None
    if isinstance(data, dict) and isinstance(data.get("proposals"), list):
        items = []
        for i, proposal in enumerate(data["proposals"]):
            if not isinstance(proposal, dict) or not isinstance(proposal.get("params"), dict):
                raise ScenarioError(
                    f'{path}: proposals[{i}] has no "params" object; give {{"params": {{...}}}}'
                )
            items.append(proposal["params"])
    elif isinstance(data, list):
        items = data
    else:
        raise ScenarioError(f'{path}: expected {{"proposals": [...]}} or a list of {{name: value}} objects')
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            raise ScenarioError(
                f'{path}: entry {i} is not an object of name: value; give {{"ankle_kp": 600, ...}}'
            )
    if not items:
        raise ScenarioError(f"{path}: holds no parameter sets; give at least one")
    return items


def safe_design(scenario: Scenario, n: int, seed: int) -> np.ndarray:
    """``(n x dim)`` scrambled Sobol points (scipy.stats.qmc) inside the SAFE bounds (log axes in log)."""
    bounds = scenario.bounds(safe=True)
    logm = np.array([p.log for p in scenario.parameters])
    lo = np.where(logm, np.log(np.where(logm, bounds[:, 0], 1.0)), bounds[:, 0])
    hi = np.where(logm, np.log(np.where(logm, bounds[:, 1], 1.0)), bounds[:, 1])
    sobol = qmc.Sobol(d=scenario.dim, scramble=True, seed=np.random.default_rng(seed))
    with warnings.catch_warnings():  # a prefix of a scrambled Sobol sequence is fine for a handful of trials
        warnings.simplefilter("ignore", UserWarning)
        u = sobol.random(n)
    v = lo + u * (hi - lo)
    return np.clip(np.where(logm, np.exp(v), v), bounds[:, 0], bounds[:, 1])


def run_standin(
    scenario: Scenario | str | Path,
    profile_path: str | Path,
    params_list: list[dict[str, float]] | str | Path | None = None,
    design: int | None = None,
    out_dir: str | Path = "standin-logs",
    seed: int = 0,
    source: str | Path | None = None,
) -> list[Path]:
    """Simulate parameter sets on the stand-in robot and write one synthetic log (CSV + sidecar) each.

    Args:
        scenario: the scenario (or its path); its ``[hardware]`` table fixes the columns and units written.
        profile_path: the perturbation profile (TOML).
        params_list: parameter sets by name (inside the scenario's bounds), or a JSON file of them (see
            :func:`load_params_file`); or None with ``design``.
        design: draw this many Sobol sets inside the SAFE bounds instead (seeded by ``seed``).
        out_dir: folder for ``standin_<profile>_s<seed>_<i>.csv`` and ``.json`` (created; files overwritten).
        seed: seeds the design and the sensor corruption (log ``i`` uses ``default_rng([seed, i])``).
        source: the file ``params_list`` was read from, when it was read by the caller (for messages).

    Returns:
        The written CSV paths, in parameter-set order. A set whose simulation diverged gets no log.
    """
    scenario = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ScenarioError(f"seed must be a non-negative integer, got {seed!r}")
    profile = load_profile(profile_path, scenario)
    if (params_list is None) == (design is None):
        raise ScenarioError(
            "give either parameter sets (params_list) or a design size (design), not both or neither"
        )
    if design is not None:
        if not 1 <= design <= MAX_LOGS:
            raise ScenarioError(f"design {design}: give between 1 and {MAX_LOGS} parameter sets")
        params = safe_design(scenario, design, seed)
    else:
        source = "" if source is None else f"{source}: "
        if isinstance(params_list, (str, Path)):  # a file: load it before counting its sets
            source = f"{params_list}: "
            params_list = load_params_file(params_list)
        if len(params_list) > MAX_LOGS:
            raise ScenarioError(f"{source}{len(params_list)} parameter sets is more than {MAX_LOGS}; split them")
        rows = []
        for i, mapping in enumerate(params_list):
            try:
                rows.append(scenario.params_from_mapping(mapping, source=f"{source}parameter set {i}"))
            except GapgaugeError as exc:
                raise ScenarioError(str(exc)) from None
        params = np.array(rows)
    n = params.shape[0]
    physics = np.tile(profile.physics_row(scenario), (n, 1))
    batch, traj = simulate(scenario, params, physics, return_trajectory=True)

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    hw = scenario.hardware
    for i in range(n):
        if batch.status[i] == "diverged":
            continue
        rng = np.random.default_rng([int(seed), i])
        t_log, columns = corrupt(
            traj.t, {c.channel: traj.channels[c.channel][i] for c in hw.columns}, profile, rng
        )
        stem = f"standin_{profile.name}_s{seed}_{i:03d}"
        csv_path = out / f"{stem}.csv"
        write_log_csv(csv_path, scenario, t_log, columns)
        outcome = "fell" if batch.status[i] == "fell" else "stood"
        sidecar = {
            "params": scenario.params_to_mapping(params[i]),
            "robot_id": profile.robot_id,
            "recorded_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "outcome": outcome,
            "notes": (
                f"SYNTHETIC: written by the gapgauge stand-in robot (profile {profile.name!r}, seed {seed}, "
                f"set {i}); not a hardware trial."
            ),
            "synthetic": True,
        }
        (out / f"{stem}.json").write_text(json.dumps(sidecar, indent=2) + "\n", encoding="utf-8")
        written.append(csv_path)
    return written


def corrupt(
    t: np.ndarray, channels: dict[str, np.ndarray], profile: StandinProfile, rng: np.random.Generator
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """What the stand-in's logger records of one simulated trial.

    Args:
        t: simulation time, ``(nstep,)`` s. channels: channel -> ``(nstep,)`` SI.
        profile: rate, jitter, dropped samples, noise sd and bias.
        rng: the log's generator.

    Returns:
        ``t_log (m,)`` s, the sampling instants ``t0 + k / rate`` moved by clipped normal jitter (first
        and last kept) with dropped samples removed, and each channel linearly interpolated there plus
        bias plus normal noise, ``(m,)`` SI.
    """
    period = 1.0 / profile.rate_hz
    count = int(math.floor((t[-1] - t[0]) / period + 1e-9)) + 1
    t_log = t[0] + np.arange(count) * period
    if profile.jitter_s > 0 and count > 2:
        limit = MAX_JITTER_FRACTION * period
        t_log[1:-1] += np.clip(rng.normal(0.0, profile.jitter_s, count - 2), -limit, limit)
    keep = np.ones(count, dtype=bool)
    if profile.drop_probability > 0 and count > 2:
        keep[1:-1] = rng.random(count - 2) >= profile.drop_probability
    t_log = t_log[keep]
    out = {}
    for channel, values in channels.items():
        clean = np.interp(t_log, t, values)
        sd = profile.noise_sd(channel)
        noise = rng.normal(0.0, sd, t_log.shape) if sd > 0 else 0.0
        out[channel] = clean + profile.bias_of(channel) + noise
    return t_log, out


def write_log_csv(path: Path, scenario: Scenario, t: np.ndarray, channels: dict[str, np.ndarray]) -> None:
    """Write a log in the hardware contract: the scenario's time column and mapped columns, in their units.

    Args:
        t: ``(m,)`` s. channels: channel -> ``(m,)`` SI, every channel of ``[hardware.columns]``.
    """
    hw = scenario.hardware
    cols = [(hw.time_column, t / UNITS[hw.time_unit][1])]
    for c in hw.columns:
        cols.append((c.column, channels[c.channel] / factor(c.unit, channel_dimension(c.channel))))
    fmt = f"{{:.{DIGITS}g}}"
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow([name for name, _ in cols])
        for k in range(len(t)):
            writer.writerow([fmt.format(v[k]) for _, v in cols])
