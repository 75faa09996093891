"""read_log: the hardware log contract, unit conversion, resampling, filtering, and each refusal."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import signal
from scipy.interpolate import interp1d

from gapgauge.errors import LogError
from gapgauge.logs import read_log
from test_logs_support import DEG, make_scenario, sidecar, table, write_log


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("scenario"))


@pytest.fixture(scope="module")
def filtered_scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("scenario_lp"), lowpass=20.0)


def good_log(tmp_path, scenario, **kwargs):
    header, rows = table(**kwargs)
    return write_log(tmp_path, header, rows, sidecar(scenario))


# ---- units and the time base ------------------------------------------------------------------


def test_degrees_become_radians_by_the_exact_factor(tmp_path, scenario):
    # deg = pi/180 rad exactly (SI brochure, 9th edition, table 8)
    header, rows = table()
    col = header.index("ankle_pos_deg")
    for r in rows:
        r[col] = "30"
    log = read_log(scenario, write_log(tmp_path, header, rows, sidecar(scenario)))
    assert np.all(log.trajectory.channels["ankle_angle"] == pytest.approx(30 * DEG, rel=1e-15))


def test_millimetres_become_metres_by_the_exact_factor(tmp_path, scenario):
    # mm = 1e-3 m exactly (SI prefix milli)
    log = read_log(scenario, good_log(tmp_path, scenario))
    assert log.trajectory.channels["com_z"][0] == pytest.approx(
        np.full(log.trajectory.t.size, 700e-3), rel=1e-15
    )
    assert log.trajectory.channels["heel_x"][0] == pytest.approx(
        np.full(log.trajectory.t.size, -45e-3), rel=1e-15
    )


def test_time_in_milliseconds_is_resampled_to_the_scenario_rate(tmp_path, scenario):
    # a 200 Hz log over 0 to 1.2 s (ms = 1e-3 s) resampled at sample_rate_hz = 500: t = k / 500 s
    log = read_log(scenario, good_log(tmp_path, scenario, rate_hz=200.0, duration=1.2))
    np.testing.assert_allclose(log.trajectory.t, np.arange(601) / 500.0, rtol=0, atol=1e-12)
    assert log.trajectory.onset == scenario.task.onset
    assert log.logged_rate_hz == pytest.approx(200.0)


def test_resampling_matches_scipy_linear_interpolation_on_an_irregular_base(tmp_path, scenario):
    rng = np.random.default_rng(7)
    steps = rng.uniform(2.0, 8.0, 400)  # ms, irregular, all below max_gap_s and median above 125 Hz
    t_ms = np.concatenate([[0.0], np.cumsum(steps)])
    t_ms = t_ms[t_ms <= 1500.0]
    header, rows = table(time_ms=t_ms)
    col = header.index("com_x_mm")
    values = 30.0 + 20.0 * np.sin(2 * np.pi * 1.3 * t_ms / 1000.0) + rng.normal(0, 1.0, t_ms.size)
    for r, v in zip(rows, values, strict=True):
        r[col] = repr(float(v))
    log = read_log(scenario, write_log(tmp_path, header, rows, sidecar(scenario)))
    reference = interp1d(t_ms * 1e-3, values * 1e-3, kind="linear")(
        log.trajectory.t
    )  # scipy as the reference
    np.testing.assert_allclose(log.trajectory.channels["com_x"][0], reference, rtol=0, atol=1e-12)


def test_lowpass_is_scipy_zero_phase_butterworth_at_the_scenario_cutoff(tmp_path, filtered_scenario):
    sc = filtered_scenario
    t_ms = np.arange(751) * 2.0  # 500 Hz: the common base equals the samples, so only the filter acts
    header, rows = table(time_ms=t_ms)
    col = header.index("com_vx")
    rng = np.random.default_rng(3)
    values = np.sin(2 * np.pi * 2.0 * t_ms / 1000.0) + rng.normal(0, 0.2, t_ms.size)
    for r, v in zip(rows, values, strict=True):
        r[col] = repr(float(v))
    log = read_log(sc, write_log(tmp_path, header, rows, sidecar(sc)))
    sos = signal.butter(4, 20.0, btype="low", fs=500.0, output="sos")  # scipy.signal as the reference
    np.testing.assert_allclose(
        log.trajectory.channels["com_vx"][0], signal.sosfiltfilt(sos, values), atol=1e-12
    )


def test_sidecar_fields_and_unknown_columns_are_reported(tmp_path, scenario):
    header, rows = table()
    header.append("battery_v")
    for r in rows:
        r.append("48.1")
    side = sidecar(scenario, outcome=None, notes='=HYPERLINK("x")', synthetic=True)
    log = read_log(scenario, write_log(tmp_path, header, rows, side))
    assert log.ignored_columns == ["battery_v"]
    assert (log.robot_id, log.outcome, log.synthetic) == ("biped-02", None, True)
    assert log.notes == '=HYPERLINK("x")'  # kept verbatim as text; never evaluated
    assert log.params == side["params"]


def test_same_files_give_the_same_sha256_and_an_edited_sidecar_another(tmp_path, scenario):
    path = good_log(tmp_path, scenario)
    first = read_log(scenario, path).sha256
    assert read_log(scenario, path).sha256 == first
    path.with_suffix(".json").write_text(json.dumps(sidecar(scenario, notes="edited")))
    assert read_log(scenario, path).sha256 != first


# ---- refusals: one line, file:line:column where they apply ---------------------------------------


def _refused(scenario, path, *fragments):
    with pytest.raises(LogError) as info:
        read_log(scenario, path)
    message = str(info.value)
    assert "\n" not in message
    for fragment in fragments:
        assert fragment in message, message
    return message


def test_missing_mapped_column_is_refused_naming_it(tmp_path, scenario):
    header, rows = table()
    i = header.index("knee_tau")
    header.pop(i)
    for r in rows:
        r.pop(i)
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:1", "'knee_tau'")


def test_non_numeric_cell_is_refused_with_line_and_column(tmp_path, scenario):
    header, rows = table()
    rows[3][5] = "=1+2"  # line 5 (header is line 1), column 6
    _refused(
        scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:5:6", "not a number"
    )


@pytest.mark.parametrize("text", ["nan", "inf", "-Infinity"])
def test_nan_or_inf_is_refused_with_line_and_column(tmp_path, scenario, text):
    header, rows = table()
    rows[9][2] = text
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:11:3", "finite")


def test_duplicated_time_is_refused(tmp_path, scenario):
    header, rows = table()
    rows[20][0] = rows[19][0]
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:22:1", "repeats")


def test_time_going_backwards_is_refused(tmp_path, scenario):
    header, rows = table()
    rows[20][0], rows[21][0] = rows[21][0], rows[20][0]
    _refused(
        scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:23:1", "backwards"
    )


def test_gap_longer_than_max_gap_is_refused(tmp_path, scenario):
    header, rows = table(rate_hz=200.0)
    del rows[50:62]  # 13 periods of 5 ms = 65 ms > max_gap_s = 0.05 s
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:52:1", "gap")


def test_sampling_slower_than_min_rate_is_refused(tmp_path):
    sc = make_scenario(tmp_path / "sc", edits={r"^max_gap_s = .*$": "max_gap_s = 0.5"})
    header, rows = table(rate_hz=50.0)  # min_rate_hz = 100
    _refused(sc, write_log(tmp_path, header, rows, sidecar(sc)), "trial_001.csv", "slower than min_rate_hz")


def test_value_beyond_plausible_range_is_kept_with_a_flag_naming_the_sample(tmp_path, scenario):
    header, rows = table()
    rows[30][header.index("heel_fz")] = "5000"  # plausible heel_force is [-50, 3000] N ([hardware.plausible])
    rows[31][header.index("heel_fz")] = "3100"
    log = read_log(scenario, write_log(tmp_path, header, rows, sidecar(scenario)))
    (flag,) = [f for f in log.flags if f.channel == "heel_force"]
    assert (flag.kind, flag.count, flag.worst) == ("plausible", 2, 5000.0)  # N: the unit declared is N
    assert flag.where.endswith("trial_001.csv:32:11") and "plausible range" in flag.detail


def test_degrees_in_a_radian_column_get_a_hint(tmp_path):
    sc = make_scenario(
        tmp_path / "sc",
        edits={r'column = "ankle_pos_deg", unit = "deg"': 'column = "ankle_pos_deg", unit = "rad"'},
    )
    header, rows = table()
    col = header.index("ankle_pos_deg")
    for r in rows:
        r[col] = "20"  # 20 rad is beyond the ankle's joint limit; 20 deg is fine
    _refused(sc, write_log(tmp_path, header, rows, sidecar(sc)), "trial_001.csv:2:2", "look like deg")


@pytest.mark.parametrize(
    ("change", "fragment"),
    [
        (lambda p: p.pop("ankle_kp"), "missing parameter(s) ankle_kp"),
        (lambda p: p.update(ankle_kx=1.0), "unknown parameter(s) ankle_kx"),
        (lambda p: p.update(ankle_kp=5000.0), "outside its bounds"),
        (lambda p: p.update(ankle_kp="600"), "finite number"),
    ],
)
def test_bad_parameters_are_refused_naming_the_sidecar(tmp_path, scenario, change, fragment):
    side = sidecar(scenario)
    change(side["params"])
    header, rows = table()
    _refused(scenario, write_log(tmp_path, header, rows, side), "trial_001.json", fragment)


def test_missing_sidecar_is_refused(tmp_path, scenario):
    header, rows = table()
    _refused(scenario, write_log(tmp_path, header, rows, None), "trial_001.json", "missing")


def test_malformed_sidecar_json_is_refused_with_line_and_column(tmp_path, scenario):
    header, rows = table()
    _refused(
        scenario,
        write_log(tmp_path, header, rows, '{"params": {}\n  "robot_id": 1}'),
        "trial_001.json:2:3",
        "not valid JSON",
    )


@pytest.mark.parametrize(
    ("key", "value"),
    [
        ("robot_id", 12),
        ("recorded_at", "yesterday"),
        ("outcome", "wobbled"),
        ("synthetic", "yes"),
        ("notes", [1]),
    ],
)
def test_sidecar_fields_of_the_wrong_type_are_refused(tmp_path, scenario, key, value):
    header, rows = table()
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario, **{key: value})), f"key '{key}'")


def test_empty_file_is_refused(tmp_path, scenario):
    path = write_log(tmp_path, [], [], sidecar(scenario))
    path.write_bytes(b"")
    _refused(scenario, path, "empty")


def test_header_only_is_refused(tmp_path, scenario):
    header, _ = table()
    _refused(scenario, write_log(tmp_path, header, [], sidecar(scenario)), "no data rows")


def test_truncated_last_row_is_refused_with_its_line(tmp_path, scenario):
    header, rows = table()
    rows[-1] = rows[-1][:4]
    _refused(
        scenario,
        write_log(tmp_path, header, rows, sidecar(scenario)),
        f"trial_001.csv:{len(rows) + 1}",
        "truncated",
    )


def test_ragged_row_inside_the_file_is_refused(tmp_path, scenario):
    header, rows = table()
    rows[4].append("1.0")
    _refused(scenario, write_log(tmp_path, header, rows, sidecar(scenario)), "trial_001.csv:6", "fields")


def test_not_utf8_is_refused_with_line_and_column(tmp_path, scenario):
    path = good_log(tmp_path, scenario)
    lines = path.read_bytes().split(b"\n")
    lines[2] = b"\xff\xfe" + lines[2]
    path.write_bytes(b"\n".join(lines))
    _refused(scenario, path, "trial_001.csv:3:1", "UTF-8")


def test_binary_junk_is_refused(tmp_path, scenario):
    path = good_log(tmp_path, scenario)
    path.write_bytes(path.read_bytes()[:300] + b"\x00\x01\x02\x00" * 50)
    _refused(scenario, path, "trial_001.csv", "NUL byte")


def test_file_over_the_size_limit_is_refused_before_reading(tmp_path):
    sc = make_scenario(tmp_path / "sc", edits={r"^max_file_mb = .*$": "max_file_mb = 0.001"})
    path = tmp_path / "big.csv"
    with path.open("wb") as fh:  # a sparse 2 MB file of NUL bytes: only the size may be looked at
        fh.truncate(2_000_000)
    _refused(sc, path, "big.csv", "over the limit of 0.001 MB")
