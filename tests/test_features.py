"""Balance features against published formulas computed here by hand on hand-made traces.

Sources (../shared/REFERENCES.md, "Balance and biomechanics"): Prieto et al. (1996) IEEE TBME
43(9):956-966 for the centre-of-pressure measures; Schubert and Kirchner (2014) for the 95% prediction
ellipse; Hof, Gazendam and Sinke (2005) J. Biomech. 38:1-8 for the extrapolated centre of mass.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np
import pytest
from scipy.stats import chi2

from gapgauge import features as F
from gapgauge.scenario import FEATURE_NAMES, FeatureSettings
from gapgauge.trajectory import MissingChannelError, Trajectory

SETTINGS = FeatureSettings(
    names=FEATURE_NAMES, fall_com_height=0.4, fall_trunk_pitch=1.0, recovery_speed=0.05, leg_length=0.66
)
G = 9.81  # standard gravity, as Hof et al. (2005) use


def standing_trajectory(nbatch: int = 3, nstep: int = 400, onset: float = 0.2, seed: int = 0) -> Trajectory:
    """A batch of plausible, different standing traces with every channel, dt = 2 ms."""
    rng = np.random.default_rng(seed)
    t = np.arange(nstep) * 0.002
    ch = {}
    wiggle = lambda scale: scale * np.cumsum(rng.normal(size=(nbatch, nstep)), axis=1) / np.sqrt(nstep)  # noqa: E731
    ch["com_x"] = 0.02 + wiggle(0.02)
    ch["com_z"] = 0.66 + wiggle(0.005)
    ch["com_vx"] = wiggle(0.2)
    ch["com_vz"] = wiggle(0.05)
    ch["trunk_pitch"] = wiggle(0.1)
    ch["heel_x"] = np.full((nbatch, nstep), -0.06)
    ch["toe_x"] = np.full((nbatch, nstep), 0.16)
    ch["heel_force"] = 200.0 + wiggle(40.0)
    ch["toe_force"] = 192.0 + wiggle(40.0)
    ch["body_contact"] = np.zeros((nbatch, nstep))
    ch["heel_y"] = 0.01 + wiggle(0.01)  # medio-lateral channels, read by the 3-D features only
    ch["toe_y"] = -0.01 + wiggle(0.01)
    ch["com_y"] = wiggle(0.01)
    for j in ("ankle", "knee", "hip"):
        ch[f"{j}_torque"] = wiggle(30.0)
        ch[f"{j}_rate"] = wiggle(1.0)
    return Trajectory(t, ch, onset=onset)


# ---- Prieto et al. (1996) centre-of-pressure measures ------------------------------------------

COP = np.array([[0.010, 0.025, -0.005, 0.000, 0.030, 0.020]])  # m, hand-made
COP_T = np.arange(6) * 0.1  # s


def test_cop_path_length_is_prieto_total_excursion():
    # Prieto 1996: total excursion = sum of |steps| = 0.015 + 0.030 + 0.005 + 0.030 + 0.010 (by hand)
    assert F.cop_path_length(COP)[0] == pytest.approx(0.090, abs=1e-12)


def test_cop_mean_velocity_is_total_excursion_over_duration():
    # Prieto 1996: mean velocity = total excursion / duration = 0.090 m / 0.5 s (by hand)
    assert F.cop_mean_velocity(COP_T, COP)[0] == pytest.approx(0.18, abs=1e-12)


def test_cop_range_is_max_minus_min():
    # Prieto 1996: range = max - min = 0.030 - (-0.005) (by hand)
    assert F.cop_range(COP)[0] == pytest.approx(0.035, abs=1e-12)


def test_cop_rms_distance_from_mean():
    # Prieto 1996: RMS distance from the mean; mean = 0.080 / 6, squares summed by hand below
    mean = 0.080 / 6
    rms = math.sqrt(sum((v - mean) ** 2 for v in COP[0]) / 6)
    assert F.cop_rms_distance(COP)[0] == pytest.approx(rms, rel=1e-12)


# ---- 95% prediction ellipse (Schubert and Kirchner 2014) ---------------------------------------


def test_sway_area_matches_chi2_formula_with_scipy_quantile():
    # Schubert and Kirchner 2014: area = pi * chi2_{0.95,2} * sqrt(det cov); quantile from scipy,
    # covariance from numpy (divisor n - 1)
    traj = standing_trajectory(nbatch=2, seed=3)
    x, z = traj.channels["com_x"], traj.channels["com_z"]
    got = F.sway_area(x, z)
    for i in range(2):
        want = math.pi * chi2.ppf(0.95, 2) * math.sqrt(np.linalg.det(np.cov(x[i], z[i])))
        assert got[i] == pytest.approx(want, rel=1e-9)


def test_sway_area_of_four_point_cross_by_hand():
    # Points (+-a, 0), (0, +-b): mean 0, sample variances 2a^2/3 and 2b^2/3, covariance 0 (by hand),
    # so area = pi * 5.991 * 2ab/3 (chi2_{0.95,2} = 5.991, REFERENCES.md)
    a, b = 0.03, 0.01
    x = np.array([[a, -a, 0.0, 0.0]])
    z = np.array([[0.0, 0.0, b, -b]])
    assert F.sway_area(x, z)[0] == pytest.approx(math.pi * 5.991 * 2 * a * b / 3, rel=1e-4)


def test_sway_area_of_gaussian_sample_approaches_known_covariance():
    # Large sample from a Gaussian with known covariance: sqrt(det) -> sqrt(det Sigma) (law of large
    # numbers); 95% ellipse area pi * chi2.ppf(0.95, 2) * sqrt(det Sigma) (Schubert and Kirchner 2014)
    sigma = np.array([[4e-4, 1.5e-4], [1.5e-4, 1e-4]])
    pts = np.random.default_rng(7).multivariate_normal([0.0, 0.7], sigma, size=200_000)
    want = math.pi * chi2.ppf(0.95, 2) * math.sqrt(np.linalg.det(sigma))
    assert F.sway_area(pts[None, :, 0], pts[None, :, 1])[0] == pytest.approx(want, rel=0.02)


def test_sway_area_ellipse_holds_95_percent_of_gaussian_points():
    # The prediction ellipse of area pi * q * sqrt(det C) is {d: d' C^-1 d <= q}; for Gaussian data
    # 95% of points fall inside (chi-square with 2 degrees of freedom). Here the ellipse's scale q is
    # recovered from the area the code returns and the count is made by hand.
    sigma = np.array([[2e-4, -5e-5], [-5e-5, 6e-5]])
    pts = np.random.default_rng(11).multivariate_normal([0.0, 0.0], sigma, size=100_000)
    area = F.sway_area(pts[None, :, 0], pts[None, :, 1])[0]
    cov = np.cov(pts.T)
    q = area / (math.pi * math.sqrt(np.linalg.det(cov)))
    d2 = np.einsum("ij,jk,ik->i", pts - pts.mean(0), np.linalg.inv(cov), pts - pts.mean(0))
    assert np.mean(d2 <= q) == pytest.approx(0.95, abs=0.005)


# ---- Hof, Gazendam and Sinke (2005) margin of stability ----------------------------------------


def test_margin_of_stability_forward_motion_measures_to_toe():
    # Hof 2005 worked case: x = 0.02 m, v = 0.3 m/s, l = 0.66 m; omega0 = sqrt(9.81 / 0.66) = 3.8553 /s,
    # XcoM = 0.02 + 0.3 / 3.8553 = 0.09781 m; moving forward, margin = toe - XcoM = 0.12 - 0.09781
    omega0 = math.sqrt(G / 0.66)
    xcom = 0.02 + 0.3 / omega0
    one = np.ones((1, 5))
    got = F.margin_of_stability(0.02 * one, 0.3 * one, -0.08 * one, 0.12 * one, leg_length=0.66)
    assert got[0] == pytest.approx(0.12 - xcom, abs=1e-12)
    assert got[0] == pytest.approx(0.02219, abs=1e-5)  # the same, worked on paper


def test_margin_of_stability_backward_motion_measures_to_heel():
    # Hof 2005: the edge in the direction of motion; moving back (v < 0) that is the heel:
    # margin = XcoM - heel = (0.0 - 0.2 / omega0) - (-0.08)
    omega0 = math.sqrt(G / 0.66)
    one = np.ones((1, 3))
    got = F.margin_of_stability(0.0 * one, -0.2 * one, -0.08 * one, 0.12 * one, leg_length=0.66)
    assert got[0] == pytest.approx(-0.2 / omega0 + 0.08, abs=1e-12)


def test_margin_of_stability_is_minimum_over_time_and_negative_outside():
    # Hof 2005 per sample, by hand; the feature is the smallest; XcoM past the toe gives a negative margin
    omega0 = math.sqrt(G / 0.66)
    x = np.array([[0.0, 0.05, 0.10]])
    v = np.array([[0.1, 0.4, 0.0]])
    per_sample = [0.12 - (xi + vi / omega0) for xi, vi in zip(x[0], v[0], strict=True)]
    got = F.margin_of_stability(x, v, np.full((1, 3), -0.08), np.full((1, 3), 0.12), leg_length=0.66)
    assert got[0] == pytest.approx(min(per_sample), abs=1e-12)
    assert got[0] < 0


# ---- fall, recovery, excursion -----------------------------------------------------------------


def test_fell_when_com_drops_below_height_in_free_fall():
    # Free fall z(t) = z0 - g t^2 / 2 (REFERENCES.md): from 0.66 m it passes 0.4 m at
    # t = sqrt(2 * 0.26 / 9.81) = 0.230 s, inside a 0.3 s trace; the second row stands still
    t = np.linspace(0.0, 0.3, 151)
    z = np.vstack([0.66 - G * t**2 / 2, np.full_like(t, 0.66)])
    assert math.sqrt(2 * 0.26 / G) < 0.3
    got = F.fell(z, np.zeros_like(z), fall_com_height=0.4, fall_trunk_pitch=1.0)
    np.testing.assert_array_equal(got, [1.0, 0.0])


def test_fell_when_trunk_pitch_exceeds_limit():
    pitch = np.array([[0.0, 0.5, -1.05], [0.0, 0.9, -0.95]])  # rad; only the first passes |1.0|
    got = F.fell(np.full_like(pitch, 0.66), pitch, fall_com_height=0.4, fall_trunk_pitch=1.0)
    np.testing.assert_array_equal(got, [1.0, 0.0])


def test_fell_when_a_non_foot_segment_touches_the_ground():
    contact = np.array([[0.0, 0.0, 150.0], [0.0, 0.0, 0.0]])  # N on the trunk in row 0
    got = F.fell(np.full_like(contact, 0.66), np.zeros_like(contact), 0.4, 1.0, body_contact=contact)
    np.testing.assert_array_equal(got, [1.0, 0.0])


def test_recovery_time_is_last_time_speed_exceeds_threshold():
    # Hand-made |v| against 0.05 m/s: the last sample above it is index 4 at 0.4 s after the first
    t = np.arange(8) * 0.1
    v = np.array([[0.2, 0.1, -0.06, 0.04, -0.07, 0.01, 0.0, 0.0]])
    assert F.recovery_time(t, v, 0.05)[0] == pytest.approx(0.4, abs=1e-12)


def test_recovery_time_without_settling_is_window_length_and_without_motion_is_zero():
    t = 1.0 + np.arange(5) * 0.25  # window starts at 1.0 s, lasts 1.0 s
    v = np.array([[0.3, 0.2, 0.1, 0.08, 0.06], [0.01, -0.02, 0.0, 0.03, 0.0]])
    np.testing.assert_allclose(F.recovery_time(t, v, 0.05), [1.0, 0.0], atol=1e-12)


def test_peak_com_excursion_is_measured_from_the_onset_position():
    x = np.array([[0.05, 0.07, 0.02, -0.01, 0.06]])  # m; largest |x - 0.05| is 0.06 at -0.01
    assert F.peak_com_excursion(x)[0] == pytest.approx(0.06, abs=1e-12)


def test_features_ignore_samples_before_onset():
    traj = standing_trajectory(nbatch=2)
    k = F.onset_index(traj.t, traj.onset)
    traj.channels["com_x"][:, : k - 1] += 0.5  # a huge excursion before the disturbance
    x = traj.channels["com_x"][:, k:]
    got = F.compute_features(traj, SETTINGS, ["peak_com_excursion"])["peak_com_excursion"]
    np.testing.assert_allclose(got, np.abs(x - x[:, :1]).max(axis=1), rtol=1e-12)
    assert traj.t[k] >= traj.onset > traj.t[k - 1]


# ---- joint effort ------------------------------------------------------------------------------


def test_peak_joint_torque_over_joints_and_time():
    ankle = np.array([[10.0, -45.0], [5.0, 5.0]])
    knee = np.array([[30.0, 20.0], [-7.0, 2.0]])
    hip = np.array([[0.0, 44.0], [6.0, -1.0]])
    np.testing.assert_array_equal(F.peak_joint_torque([ankle, knee, hip]), [45.0, 7.0])


def test_positive_work_of_sine_torque_and_rate_over_a_period_is_pi():
    # integral_0^{2 pi} sin^2 = pi (all power positive)
    t = np.linspace(0.0, 2 * math.pi, 2001)
    s = np.sin(t)[None, :]
    zero = np.zeros_like(s)
    got = F.positive_work(t, [s, zero, zero], [s, zero, zero])
    assert got[0] == pytest.approx(math.pi, rel=1e-6)


def test_positive_work_counts_only_positive_power():
    # tau = sin, omega = cos: power sin cos = sin(2t)/2 nets zero over a period; its positive part is
    # 2 * integral_0^{pi/2} sin(2t)/2 dt = 1 (by hand)
    t = np.linspace(0.0, 2 * math.pi, 4001)
    got = F.positive_work(t, [np.sin(t)[None, :]], [np.cos(t)[None, :]])
    assert got[0] == pytest.approx(1.0, rel=1e-5)


def test_positive_work_sums_joints():
    # Constant power 2 W on two joints for 3 s: 2 * 2 * 3 = 12 J (by hand)
    t = np.linspace(0.0, 3.0, 7)
    one = np.ones((1, 7))
    assert F.positive_work(t, [2 * one, one], [one, 2 * one])[0] == pytest.approx(12.0, rel=1e-12)


# ---- centre of pressure from the foot forces ---------------------------------------------------


def test_cop_from_heel_and_toe_forces_is_the_lever_rule():
    # Statics: 300 N at the heel (-0.05 m) and 100 N at the toe (0.15 m); moments about the heel balance
    # at 100 * 0.20 / 400 = 0.05 m in front of the heel, i.e. x = 0.0 m
    got = F.cop_from_foot_forces(np.array([[300.0]]), np.array([[100.0]]), np.array([[-0.05]]),
                                 np.array([[0.15]]))
    assert got[0, 0] == pytest.approx(0.0, abs=1e-12)


def test_cop_of_unloaded_foot_is_nan_without_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = F.cop_from_foot_forces(np.array([[0.0, 400.0]]), np.array([[0.0, 0.0]]),
                                     np.array([[-0.05, -0.05]]), np.array([[0.15, 0.15]]))
    assert np.isnan(got[0, 0])
    assert got[0, 1] == pytest.approx(-0.05, abs=1e-12)  # all the load on the heel: the COP is the heel


def test_compute_features_derives_cop_from_forces_when_cop_channel_is_absent():
    traj = standing_trajectory(nbatch=2, seed=5)
    k = F.onset_index(traj.t, traj.onset)
    ch = {n: v[:, k:] for n, v in traj.channels.items()}
    # Lever rule by hand, then Prieto's range (max - min)
    moment = ch["heel_force"] * ch["heel_x"] + ch["toe_force"] * ch["toe_x"]
    cop = moment / (ch["heel_force"] + ch["toe_force"])
    got = F.compute_features(traj, SETTINGS, ["cop_range"])["cop_range"]
    np.testing.assert_allclose(got, cop.max(axis=1) - cop.min(axis=1), rtol=1e-12)


def test_logged_cop_channel_is_used_as_is():
    traj = standing_trajectory(nbatch=1)
    traj.channels["cop_x"] = np.zeros_like(traj.channels["com_x"])
    traj.channels["cop_x"][0, -1] = 0.01
    assert F.compute_features(traj, SETTINGS, ["cop_range"])["cop_range"][0] == pytest.approx(0.01)


# ---- the trajectory front end ------------------------------------------------------------------


def test_missing_channel_raises_naming_feature_and_channel():
    traj = standing_trajectory(nbatch=1)
    del traj.channels["toe_force"]
    with pytest.raises(MissingChannelError) as err:
        F.compute_features(traj, SETTINGS, ["cop_path_length"])
    assert err.value.channel == "toe_force" and err.value.feature == "cop_path_length"
    assert "cop_path_length" in str(err.value) and "toe_force" in str(err.value)


def test_missing_trunk_pitch_is_not_guessed_for_fell():
    traj = standing_trajectory(nbatch=1)
    del traj.channels["trunk_pitch"]
    with pytest.raises(MissingChannelError, match="trunk_pitch"):
        F.compute_features(traj, SETTINGS, ["fell"])


def test_hardware_trace_without_body_contact_still_gives_every_feature():
    traj = standing_trajectory(nbatch=1)
    del traj.channels["body_contact"]  # simulation only
    got = F.compute_features(traj, SETTINGS)
    assert set(got) == set(FEATURE_NAMES)
    assert all(np.isfinite(v[0]) for v in got.values())


def test_unknown_feature_name_is_refused():
    with pytest.raises(ValueError, match="unknown feature"):
        F.compute_features(standing_trajectory(nbatch=1), SETTINGS, ["sway_volume"])


def test_batch_results_equal_per_row_results():
    traj = standing_trajectory(nbatch=6, seed=2)
    batch = F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    for i in range(traj.nbatch):
        row = F.compute_features(traj.select(i), SETTINGS, F.AVAILABLE_FEATURES)
        for name in F.AVAILABLE_FEATURES:
            np.testing.assert_allclose(batch[name][i], row[name][0], rtol=1e-12, atol=1e-15, err_msg=name)


def test_nan_row_stays_nan_others_unchanged_and_silent():
    traj = standing_trajectory(nbatch=3, seed=4)
    clean = F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    for v in traj.channels.values():
        v[1, 300:] = np.nan  # a rollout that diverged after the onset
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    for name in F.AVAILABLE_FEATURES:
        assert np.isnan(got[name][1]), name
        np.testing.assert_array_equal(got[name][[0, 2]], clean[name][[0, 2]], err_msg=name)


def test_fell_is_float_zero_or_one():
    got = F.compute_features(standing_trajectory(nbatch=2), SETTINGS, ["fell"])["fell"]
    assert got.dtype == float and set(got.tolist()) <= {0.0, 1.0}


class _Bounds:
    success_max = {"recovery_time": 2.0}


def test_success_needs_no_fall_and_every_bound():
    # Scenario rule: no fall and recovery_time <= 2.0 s; a NaN (diverged) row is no success
    feats = {"fell": np.array([0.0, 1.0, 0.0, 0.0, np.nan]),
             "recovery_time": np.array([1.0, 1.0, 2.5, 2.0, 1.0])}
    np.testing.assert_array_equal(F.success(feats, _Bounds()), [True, False, False, True, False])


def test_unloaded_samples_hold_the_last_centre_of_pressure():
    # While the foot is in the air the COP is undefined; it is held at its last value (leading gaps take
    # the first defined value), so only the jump at touch-down counts as excursion
    x = np.array([[0.0, np.nan, np.nan, 0.02], [np.nan, 0.01, 0.03, np.nan]])
    np.testing.assert_array_equal(F.hold_last_defined(x), [[0.0, 0.0, 0.0, 0.02], [0.01, 0.01, 0.03, 0.03]])


def test_row_blocking_does_not_change_results(monkeypatch):
    traj = standing_trajectory(nbatch=7, seed=8)
    whole = F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    monkeypatch.setattr("gapgauge.features.compute.BLOCK_SAMPLES", 1)  # one row per block
    rowwise = F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    for name in F.AVAILABLE_FEATURES:
        np.testing.assert_allclose(rowwise[name], whole[name], rtol=1e-12, atol=1e-15, err_msg=name)


def test_compute_features_leaves_the_trajectory_untouched():
    traj = standing_trajectory(nbatch=2, seed=9)
    before = {n: v.copy() for n, v in traj.channels.items()}
    F.compute_features(traj, SETTINGS, F.AVAILABLE_FEATURES)
    for name, values in before.items():
        np.testing.assert_array_equal(traj.channels[name], values, err_msg=name)


# ---- 3-D models: medio-lateral and 2-D forms (Prieto et al. 1996) -------------------------------

# A hand-made planar COP trace, m: anterior-posterior (AP) and medio-lateral (ML), six samples 0.1 s apart.
AP = np.array([[0.00, 0.03, 0.03, 0.00, 0.00, 0.04]])
ML = np.array([[0.00, 0.00, 0.04, 0.04, 0.01, 0.01]])


def test_cop_path_length_2d_is_prieto_total_excursion_of_the_resultant():
    # Prieto 1996 TOTEX = sum_i sqrt(dAP^2 + dML^2); steps by hand: (0.03, 0) 0.03, (0, 0.04) 0.04,
    # (-0.03, 0) 0.03, (0, -0.03) 0.03, (0.04, 0) 0.04: total 0.17 m
    assert F.cop_path_length_2d(AP, ML)[0] == pytest.approx(0.17, abs=1e-12)
    # ... and MVELO = TOTEX / duration (0.5 s)
    assert F.cop_mean_velocity_2d(COP_T, AP, ML)[0] == pytest.approx(0.34, abs=1e-12)


def test_medio_lateral_forms_are_the_one_axis_measures_of_the_ml_trace():
    # Prieto 1996 TOTEX_ML = sum |dML| = 0 + 0.04 + 0 + 0.03 + 0 = 0.07; RANGE_ML = 0.04 - 0.00
    assert F.cop_path_length(ML)[0] == pytest.approx(0.07, abs=1e-12)
    assert F.cop_range(ML)[0] == pytest.approx(0.04, abs=1e-12)


def test_cop_rms_and_mean_distance_2d_are_prieto_rdist_and_mdist():
    # Prieto 1996: RD = sqrt(AP^2 + ML^2) of the mean-removed trace; RDIST = sqrt(mean RD^2), MDIST = mean RD.
    # By hand: mean AP = 0.10 / 6, mean ML = 0.10 / 6.
    ap = AP[0] - 0.1 / 6
    ml = ML[0] - 0.1 / 6
    rd = [math.sqrt(a * a + m * m) for a, m in zip(ap, ml, strict=True)]
    assert F.cop_rms_distance_2d(AP, ML)[0] == pytest.approx(math.sqrt(sum(r * r for r in rd) / 6), rel=1e-12)
    assert F.cop_mean_distance_2d(AP, ML)[0] == pytest.approx(sum(rd) / 6, rel=1e-12)


def test_horizontal_sway_area_of_a_circle_is_the_chi2_ellipse_of_its_covariance():
    # A trace evenly around a circle of radius r has covariance (r^2 / 2) I (n / (n - 1) with the n - 1
    # divisor), so the 95% prediction ellipse has area pi * chi2_{0.95,2} * r^2 / 2 * n / (n - 1)
    # (Schubert and Kirchner 2014; chi2 quantile from scipy).
    n, r = 400, 0.02
    angle = np.arange(n) * 2 * math.pi / n
    x, y = r * np.cos(angle)[None, :], r * np.sin(angle)[None, :]
    expected = math.pi * chi2.ppf(0.95, 2) * r * r / 2 * n / (n - 1)
    assert F.sway_area_2d(x, y)[0] == pytest.approx(expected, rel=1e-9)
    assert F.cop_sway_area(x, y)[0] == pytest.approx(expected, rel=1e-9)


def test_cop_of_several_contact_groups_is_their_force_weighted_position():
    # Statics: the resultant of parallel forces acts at sum F_i x_i / sum F_i; by hand for 100, 300, 100 N
    # at 0.0, 0.1, 0.2 m: (0 + 30 + 20) / 500 = 0.1 m.
    forces = [np.array([[100.0]]), np.array([[300.0]]), np.array([[100.0]])]
    where = [np.array([[0.0]]), np.array([[0.1]]), np.array([[0.2]])]
    assert F.cop_from_contacts(forces, where)[0, 0] == pytest.approx(0.1, abs=1e-15)
    # with two groups it is the heel-toe lever rule, to the last bit
    heel, toe = np.array([[210.0, 3.0]]), np.array([[97.0, 1.0]])
    hx, tx = np.array([[-0.05, -0.04]]), np.array([[0.14, 0.15]])
    np.testing.assert_array_equal(F.cop_from_contacts([heel, toe], [hx, tx]), F.cop_from_foot_forces(heel, toe, hx, tx))


def test_a_3d_trace_gives_the_lateral_features_and_a_planar_one_names_the_missing_channel():
    traj = standing_trajectory(nbatch=2, seed=5)
    lateral = dataclasses.replace(SETTINGS, lateral=True)
    got = F.compute_features(traj, lateral, ["cop_range_ml", "cop_path_length_2d", "sway_area_2d"])
    cop_y = F.cop_from_contacts([traj.channels["heel_force"], traj.channels["toe_force"]],
                                [traj.channels["heel_y"], traj.channels["toe_y"]])
    start = F.onset_index(traj.t, traj.onset)
    assert got["cop_range_ml"] == pytest.approx(np.ptp(F.hold_last_defined(cop_y)[:, start:], axis=1))
    del traj.channels["heel_y"]
    with pytest.raises(MissingChannelError, match="cop_range_ml.*heel_y"):
        F.compute_features(traj, lateral, ["cop_range_ml"])


def test_torque_and_work_sum_over_every_actuated_joint_named_in_the_settings():
    # Five joints with different names: peak |torque| over them all; work = sum of each joint's.
    traj = standing_trajectory(nbatch=2, seed=6)
    joints = ("left_ankle", "right_ankle", "left_hip", "right_hip", "waist")
    for j, name in enumerate(joints):
        traj.channels[f"{name}_torque"] = traj.channels["ankle_torque"] * (j + 1)
        traj.channels[f"{name}_rate"] = traj.channels["ankle_rate"]
    settings = dataclasses.replace(SETTINGS, joints=joints)
    got = F.compute_features(traj, settings, ["peak_joint_torque", "positive_work"])
    one = F.compute_features(traj, dataclasses.replace(SETTINGS, joints=("ankle",)), ["peak_joint_torque",
                                                                                       "positive_work"])
    # torque scaled by j + 1 with the same rate: peak x 5, work x (1 + 2 + 3 + 4 + 5) = x 15
    assert got["peak_joint_torque"] == pytest.approx(5 * one["peak_joint_torque"], rel=1e-12)
    assert got["positive_work"] == pytest.approx(15 * one["positive_work"], rel=1e-12)
