"""Unit sanity at ingest: a channel logged in another unit than declared is refused with the fix, once its
scale is compared with the matched simulation at the same parameters; another large mismatch is a flag.

The wrong-unit logs are made here from stand-in logs by a converter of the test's own (tests/
test_logs_support.convert_log), with the unit factors of the SI brochure (BIPM, 9th edition, 2019):
the degree is pi/180 rad exactly (table 8); milli is 1e-3 exactly (table 7: mm/m, ms/s); the
kilogram-force is 9.80665 N exactly, from the conventional standard acceleration of gravity
g_n = 9.80665 m/s^2 of the 3rd CGPM (1901), quoted in the brochure's appendix 1.
"""

from __future__ import annotations

import math

import pytest

from gapgauge.app.ingest import ingest
from gapgauge.errors import LogError
from gapgauge.logs import read_log
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store
from test_logs_support import ROOT, convert_log, make_scenario

DEG_PER_RAD = 180.0 / math.pi  # SI brochure, 9th ed., table 8: 1 deg = (pi/180) rad
MILLI = 1e-3  # SI brochure, 9th ed., table 7
G_N = 9.80665  # m/s^2, 3rd CGPM (1901), SI brochure, 9th ed., appendix 1: 1 kgf = 9.80665 N


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("units_sc"), lowpass=40.0)


@pytest.fixture(scope="module")
def standin_log(scenario, tmp_path_factory):
    """One stand-in log (close profile) at the nominal parameters, in the scenario's declared units."""
    nominal = scenario.params_to_mapping(scenario.nominal_parameters())
    (path,) = run_standin(scenario, ROOT / "scenarios/standin/close.toml", params_list=[nominal],
                          out_dir=tmp_path_factory.mktemp("units_logs"), seed=3)
    return path


def ingest_one(scenario, path, store_path):
    with Store(store_path) as store:
        summary = ingest(scenario, store, [path], matches=1, progress=False)
        trials = store.trials(scenario.content_hash)
        runs = store.runs(kind="match")
    return summary, trials, runs


def test_the_stand_in_log_in_its_declared_units_is_accepted_without_a_scale_flag(tmp_path, scenario, standin_log):
    summary, trials, _ = ingest_one(scenario, standin_log, tmp_path / "s.sqlite")
    assert not summary.failed and len(trials) == 1
    assert [f for f in trials[0].extra["flags"] if f["kind"] == "scale"] == []


@pytest.mark.parametrize(
    ("column", "channel", "factor", "declared", "likely"),
    [
        # values in rad under a column the scenario declares in deg: every angle 57.3 times too small
        ("ankle_pos_deg", "ankle_angle", 1 / DEG_PER_RAD, "deg", "rad"),
        # the centre-of-mass height in m under a column declared in mm: 1000 times too small
        ("com_z_mm", "com_z", MILLI, "mm", "m"),
        # joint rates in rad/s under a column declared in deg/s
        ("knee_vel_dps", "knee_rate", 1 / DEG_PER_RAD, "deg/s", "rad/s"),
        # a load cell read out in kgf under a column declared in N
        ("toe_fz", "toe_force", 1 / G_N, "N", "kgf"),
        # the centre-of-mass speed in mm/s under a column declared in m/s: 1000 times too large
        ("com_vx", "com_vx", 1 / MILLI, "m/s", "mm/s"),
    ],
)
def test_a_channel_in_another_unit_is_refused_with_the_likely_unit_and_the_fix(
    tmp_path, scenario, standin_log, column, channel, factor, declared, likely
):
    wrong = convert_log(standin_log, tmp_path / "in" / "wrong_unit.csv", {column: lambda v: v * factor})
    summary, trials, runs = ingest_one(scenario, wrong, tmp_path / "s.sqlite")
    ((path, reason),) = summary.failed
    assert path == str(wrong) and "\n" not in reason
    assert f"{channel} looks like {likely}, declared {declared}" in reason
    assert f'set unit = "{likely}" for {channel} in [hardware.columns]' in reason
    assert trials == [] and runs == []  # nothing of the refused file is stored, not even its empty match run


def test_a_large_scale_mismatch_that_no_unit_explains_is_a_flag_not_a_refusal(tmp_path, scenario, standin_log):
    # 25 times the heel force: no unit factor of force (1000 kN/N, 9.80665 kgf/N) is within 1.6 times of it
    odd = convert_log(standin_log, tmp_path / "in" / "odd_scale.csv", {"heel_fz": lambda v: v * 25.0})
    summary, trials, _ = ingest_one(scenario, odd, tmp_path / "s.sqlite")
    assert not summary.failed
    (flag,) = [f for f in trials[0].extra["flags"] if f["kind"] == "scale"]
    assert flag["channel"] == "heel_force" and flag["worst"] == pytest.approx(25.0, rel=0.05)
    assert any("heel_force: scale" in line for line in summary.stored[0].flags)


def test_a_time_column_in_seconds_declared_as_milliseconds_is_refused_with_the_hint(tmp_path, scenario, standin_log):
    wrong = convert_log(standin_log, tmp_path / "in" / "time_in_s.csv", {"time_ms": lambda v: v * MILLI})
    with pytest.raises(LogError) as info:
        read_log(scenario, wrong)
    assert "is the time column in s, not ms?" in str(info.value) and "\n" not in str(info.value)
