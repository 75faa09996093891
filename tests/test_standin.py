"""The stand-in robot: logs in exactly the hardware contract, the profile's perturbations and noise."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest

from gapgauge.errors import GapgaugeError
from gapgauge.logs import read_log
from gapgauge.sim.rollout import simulate
from gapgauge.sim.standin import load_params_file, load_profile, run_standin, safe_design
from gapgauge.units import UNITS
from test_logs_support import ROOT, make_scenario

ZERO_PROFILE = """
name = "zero"
robot_id = "standin-zero"
[logging]
rate_hz = 500.0
"""

NOISY_PROFILE = """
name = "noisy"
[noise]
angle = 0.01
[bias]
knee_angle = 0.02
[logging]
rate_hz = 500.0
"""


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("standin_sc"))  # no low-pass: logs are read back unfiltered


def profile(tmp_path, text):
    path = tmp_path / "profile.toml"
    path.write_text(text)
    return path


def read_csv(path):
    with path.open(newline="") as fh:
        rows = list(csv.reader(fh))
    return rows[0], np.array(rows[1:], dtype=float)


def test_standin_logs_follow_the_hardware_contract_and_say_synthetic(tmp_path, scenario):
    paths = run_standin(scenario, ROOT / "scenarios/standin/close.toml", design=2, out_dir=tmp_path, seed=3)
    assert len(paths) == 2
    hw = scenario.hardware
    for path in paths:
        header, _ = read_csv(path)
        assert header == [hw.time_column] + [c.column for c in hw.columns]
        side = json.loads(path.with_suffix(".json").read_text())
        assert side["synthetic"] is True and "SYNTHETIC" in side["notes"]
        assert side["outcome"] in ("stood", "fell")
        log = read_log(scenario, path)  # the reader accepts it as a hardware log
        assert log.synthetic and log.robot_id == "standin-close"


def test_zero_noise_log_is_the_simulation_in_the_declared_units(tmp_path, scenario):
    nominal = scenario.params_to_mapping(scenario.nominal_parameters())
    (path,) = run_standin(scenario, profile(tmp_path, ZERO_PROFILE), params_list=[nominal], out_dir=tmp_path)
    header, data = read_csv(path)
    _, traj = simulate(scenario, scenario.nominal_parameters(), return_trajectory=True)
    np.testing.assert_allclose(data[:, 0] * 1e-3, traj.t, rtol=0, atol=1e-12)  # ms = 1e-3 s
    for c in scenario.hardware.columns:
        values = data[:, header.index(c.column)] * UNITS[c.unit][1]
        # exact factors by definition: deg = pi/180 rad, mm = 1e-3 m (SI brochure, 9th ed.)
        want = traj.channels[c.channel][0]
        np.testing.assert_allclose(values, want, rtol=1e-9, atol=1e-9 * (np.abs(want).max() + 1e-12))


def test_sensor_noise_and_bias_have_the_profile_values(tmp_path, scenario):
    nominal = scenario.params_to_mapping(scenario.nominal_parameters())
    (path,) = run_standin(scenario, profile(tmp_path, NOISY_PROFILE), params_list=[nominal], out_dir=tmp_path)
    header, data = read_csv(path)
    _, traj = simulate(scenario, scenario.nominal_parameters(), return_trajectory=True)
    n = data.shape[0]
    for channel, column, bias in (
        ("ankle_angle", "ankle_pos_deg", 0.0),
        ("knee_angle", "knee_pos_deg", 0.02),
    ):
        residual = data[:, header.index(column)] * math.pi / 180 - traj.channels[channel][0]
        # sample sd of n normal draws has standard error sd / sqrt(2 n); mean has sd / sqrt(n): 5 sigma bands
        assert residual.std(ddof=1) == pytest.approx(0.01, abs=5 * 0.01 / math.sqrt(2 * n))
        assert residual.mean() == pytest.approx(bias, abs=5 * 0.01 / math.sqrt(n))


def test_shipped_profiles_set_the_stated_physics(scenario):
    profiles = {
        name: load_profile(ROOT / f"scenarios/standin/{name}.toml", scenario)
        for name in ("close", "heavy_slippery", "weak_laggy")
    }
    assert profiles["close"].physics == {}
    assert profiles["heavy_slippery"].physics == {"trunk_mass_scale": 1.15, "friction": 0.6}
    assert profiles["weak_laggy"].physics == {"servo_strength": 0.85, "servo_lag": 0.025}


def test_design_sets_lie_inside_the_safe_bounds(scenario):
    x = safe_design(scenario, 50, seed=1)
    bounds = scenario.bounds(safe=True)
    assert x.shape == (50, scenario.dim)
    assert np.all((x >= bounds[:, 0]) & (x <= bounds[:, 1]))
    assert len({tuple(row) for row in x}) == 50


def test_params_file_takes_propose_output_or_a_plain_list(tmp_path, scenario):
    nominal = scenario.params_to_mapping(scenario.nominal_parameters())
    proposals = tmp_path / "proposals.json"
    proposals.write_text(json.dumps({"proposals": [{"params": nominal, "expected": 0.3}], "caution": "..."}))
    plain = tmp_path / "plain.json"
    plain.write_text(json.dumps([nominal, nominal]))
    assert load_params_file(proposals) == [nominal]
    assert load_params_file(plain) == [nominal, nominal]


@pytest.mark.parametrize("text", ['{"proposals": [1]}', "[1, 2]", "{}", "[", "[]"])
def test_malformed_params_file_is_refused(tmp_path, text):
    path = tmp_path / "bad.json"
    path.write_text(text)
    with pytest.raises(GapgaugeError, match="bad.json"):
        load_params_file(path)


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("[physics]\nfriction = -1.0", "physics.friction"),
        ("[physics]\nmass = 2.0", "physics.mass"),
        ("[noise]\nangle = -0.1", "noise.angle"),
        ("[logging]\nrate_hz = 10.0", "logging.rate_hz"),
        ("colour = 1", "colour"),
    ],
)
def test_malformed_profile_is_refused_naming_the_key(tmp_path, scenario, text, key):
    with pytest.raises(GapgaugeError, match=f"key '{key}'"):
        load_profile(profile(tmp_path, text), scenario)
