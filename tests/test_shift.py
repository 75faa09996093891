"""Feature shift (compare/shift/ and app/shift.py): figures against closed forms and scipy, intervals and
verdicts by repetition and on built cases, the typed result's round trip, the job on a real store."""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from gapgauge.app.shift import assess_shift
from gapgauge.compare.shift import (
    VERDICTS,
    FeatureShift,
    JointShift,
    RankAgreement,
    ShiftReport,
    VerdictInputs,
    decide_verdict,
    feature_shift,
    shift_from_arrays,
    t_test_power,
    trials_to_decide,
)
from gapgauge.compare.shift.statistics import paired_bias_intervals
from gapgauge.errors import ModelError, StoreError
from gapgauge.records import RolloutBatch, TrialRecord
from gapgauge.scenario import ShiftSettings, load_scenario
from gapgauge.store import Store

SETTINGS = ShiftSettings(level=0.05, residual_limit=2.0, offset_limit=1.0, rank_threshold=0.4,
                         bootstrap=1000, permutations=200)
K = 32
SCENARIO_PATH = Path(__file__).resolve().parents[1] / "scenarios" / "push_recovery.toml"


def _matched(rng: np.random.Generator, n: int, shift_sd: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """n trials at different parameters: hardware and its K simulations drawn from one normal per trial
    (trial means spread widely, sd 1), the hardware moved by ``shift_sd`` standard deviations."""
    location = rng.normal(10.0, 4.0, size=n)
    sims = location[:, None] + rng.standard_normal((n, K))
    hardware = location + rng.standard_normal(n) + shift_sd
    return hardware, sims


# ---- per-feature figures ----------------------------------------------------------------------


def test_wasserstein_and_ks_of_a_translated_simulation_are_the_translation_and_one_over_n():
    # Each simulated column is the hardware values (0, 1, ..., 5) permuted and moved by c = 0.3, so the
    # pooled simulations are the hardware distribution translated by c. Closed forms: W1 between a
    # distribution and its translate is |c| (W1 = integral of |F^-1 - G^-1|, Vallender 1973); with c
    # below the spacing 1 the distribution functions differ by 1/n on every step, so KS = 1/6.
    n, c = 6, 0.3
    hardware = np.arange(n, dtype=float)
    sims = np.stack([np.roll(hardware, k) for k in range(K)], axis=1) + c
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    assert result.wasserstein == pytest.approx(c, rel=1e-12)
    assert result.ks_statistic == pytest.approx(1 / n, rel=1e-12)


def test_residuals_and_bias_follow_their_definitions():
    # Definitions (DESIGN.md section 5): residual = (hw - mean_sim) / sd_sim (sample sd);
    # bias = mean(hw - mean_sim).
    hardware, sims = _matched(np.random.default_rng(4), 4)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    expected = (hardware - sims.mean(axis=1)) / sims.std(axis=1, ddof=1)
    np.testing.assert_allclose(result.residuals, expected, rtol=1e-12)
    assert result.bias == pytest.approx(float(np.mean(hardware - sims.mean(axis=1))), rel=1e-12)


def test_t_interval_of_the_bias_is_the_textbook_formula():
    # Student t interval of a mean: d_bar +- t_{1-level/2, n-1} s / sqrt(n) (e.g. Casella and Berger
    # 2002, example 9.2.13), with the quantile from scipy.stats.t.ppf.
    hardware, sims = _matched(np.random.default_rng(5), 5, shift_sd=0.4)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    d = hardware - sims.mean(axis=1)
    half = stats.t.ppf(0.975, d.size - 1) * d.std(ddof=1) / math.sqrt(d.size)
    np.testing.assert_allclose(result.bias_interval_t, (d.mean() - half, d.mean() + half), rtol=1e-10)


def test_paired_bias_t_interval_covers_the_true_bias_at_the_nominal_rate():
    # For a normal sample the t interval covers the mean with probability exactly 1 - level (Student
    # 1908). 400 samples of 6 differences from N(0.7, 1.3^2): the count covering 0.7 must lie in the
    # central 99% of Binomial(400, 0.95) (scipy.stats.binom.interval).
    rng = np.random.default_rng(60)
    repetitions, truth = 400, 0.7
    covered = 0
    for _ in range(repetitions):
        interval = paired_bias_intervals(rng.normal(truth, 1.3, size=6), 0.05, 200, rng).t
        covered += interval[0] < truth < interval[1]
    low, high = stats.binom.interval(0.99, repetitions, 0.95)
    assert low <= covered <= high, covered


def test_paired_bias_bootstrap_interval_covers_the_true_bias_at_about_the_nominal_rate_with_40_trials():
    # The percentile bootstrap interval is first-order accurate (Efron and Tibshirani 1993, ch. 13-14):
    # with 40 normal differences its coverage of the mean is a little under 1 - level (by the normal
    # approximation, P(|T_39| < 1.96 sqrt(39/40)) = 0.94). 1000 repetitions (binomial sd 0.008);
    # accepted: within 0.95 +- 0.04. A wrong level (90%: about 0.89) or scale falls outside.
    rng = np.random.default_rng(61)
    repetitions, truth = 1000, -0.2
    covered = 0
    for _ in range(repetitions):
        interval = paired_bias_intervals(rng.normal(truth, 0.5, size=40), 0.05, 1000, rng).bootstrap
        covered += interval[0] < truth < interval[1]
    assert abs(covered / repetitions - 0.95) <= 0.04, covered


def test_rank_agreement_equals_scipy_kendall_and_spearman():
    # Reference: scipy.stats.kendalltau / spearmanr between simulated means and hardware values.
    hardware, sims = _matched(np.random.default_rng(6), 7, shift_sd=0.3)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    assert result.rank.kendall == pytest.approx(stats.kendalltau(sims.mean(axis=1), hardware).statistic)
    assert result.rank.spearman == pytest.approx(stats.spearmanr(sims.mean(axis=1), hardware).statistic)


def test_link_equals_scipy_linregress_of_hardware_on_simulated_means():
    # Reference: scipy.stats.linregress (OLS) of hardware on the simulated means.
    hardware, sims = _matched(np.random.default_rng(8), 6, shift_sd=1.0)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    fit = stats.linregress(sims.mean(axis=1), hardware)
    assert result.link.slope == pytest.approx(fit.slope, rel=1e-10)
    assert result.link.intercept == pytest.approx(fit.intercept, rel=1e-10)


# ---- verdicts by repetition -------------------------------------------------------------------


@pytest.mark.slow
def test_one_sd_shift_is_flagged_in_at_least_90_percent_of_repetitions_with_5_trials():
    # With 5 trials and offset_limit = 1 sd, a 1-sd shift sits on the equivalence margin, where the two
    # one-sided tests (Schuirmann 1987) call it equivalent at most level = 5% of the time; so it must
    # be flagged (any verdict but "carries_over") in at least 90% of 200 repetitions.
    rng = np.random.default_rng(10)
    flagged = 0
    for _ in range(200):
        hardware, sims = _matched(rng, 5, shift_sd=1.0)
        flagged += feature_shift("x", hardware, sims, SETTINGS, rng).verdict != "carries_over"
    assert flagged >= 180, flagged


@pytest.mark.slow
def test_no_shift_with_10_trials_carries_over_in_most_repetitions():
    # The other error: with 10 trials and no shift the verdict should mostly be "carries_over".
    # Normal approximation: the 90% t interval's half width is 1.83 * 1.02 / sqrt(10) = 0.59 sd, so it lies
    # inside +-1 sd when |bias| < 0.41 sd, probability 2 * Phi(0.41 / 0.32) - 1 = 0.80; "most" = over half.
    rng = np.random.default_rng(12)
    carried = 0
    for _ in range(200):
        hardware, sims = _matched(rng, 10)
        carried += feature_shift("x", hardware, sims, SETTINGS, rng).verdict == "carries_over"
    assert carried > 100, carried


@pytest.mark.parametrize("n", [2, 3])
def test_few_trials_with_a_moderate_offset_are_undecided_with_a_number_of_more_trials(n):
    # A 0.5-sd offset with 2-3 trials can be neither excluded nor confirmed. The number of trials to
    # decide must be at least the normal-approximation size for detecting 1 sd with 80% power at 0.05,
    # ((z_0.975 + z_0.8) * sd / delta)^2 (e.g. Chow, Shao and Wang 2008, sample size for a one-sample mean).
    rng = np.random.default_rng(20 + n)
    normal_n = math.ceil((stats.norm.ppf(0.975) + stats.norm.ppf(0.8)) ** 2)
    undecided = 0
    for _ in range(50):
        hardware, sims = _matched(rng, n, shift_sd=0.5)
        result = feature_shift("x", hardware, sims, SETTINGS, rng)
        if result.verdict == "undecided":
            undecided += 1
            assert result.more_trials >= 1
            assert result.trials_to_decide >= normal_n
            assert result.more_trials == result.trials_to_decide - n
            assert "more trial" in result.reason
    assert undecided >= 40, undecided


def test_t_test_power_matches_simulated_rejection_rate():
    # Reference: 20000 simulated one-sample t-tests (scipy.stats.ttest_1samp) with n = 6, true mean 1 sd;
    # the rejection rate lies within 4 binomial standard errors of the computed power.
    rng = np.random.default_rng(30)
    draws = rng.normal(1.0, 1.0, size=(20000, 6))
    rate = float(np.mean(stats.ttest_1samp(draws, 0.0, axis=1).pvalue < 0.05))
    power = float(t_test_power(np.array([6]), 1.0, 1.0, 0.05)[0])
    assert abs(rate - power) < 4 * math.sqrt(power * (1 - power) / 20000)


@pytest.mark.parametrize("margin", [1.0, 0.5])
def test_trials_to_decide_is_close_to_the_normal_approximation(margin):
    # Normal-approximation sample sizes for a one-sample mean (e.g. Chow, Shao and Wang 2008):
    # detecting delta, (z_0.975 + z_0.8)^2 (sd/delta)^2; equivalence within +-delta at zero bias,
    # (z_0.95 + z_0.9)^2 (sd/delta)^2.
    # The t-based answer is at least the larger of the two and, for these sizes, at most 4 more.
    z = stats.norm.ppf
    normal = max((z(0.975) + z(0.8)) ** 2, (z(0.95) + z(0.9)) ** 2) / margin**2
    n = trials_to_decide(margin, 1.0, 0.05)
    assert math.ceil(normal) <= n <= math.ceil(normal) + 4


# ---- the verdict rule on constructed evidence ------------------------------------------------


def _inputs(**changes) -> VerdictInputs:
    base = dict(n_trials=8, simulated_spread=1.0, bias=0.1, test_interval=(-0.5, 0.7),
                equivalence_interval=(-0.4, 0.6), residual_exceedances=0, residual_p_value=1.0,
                kendall=0.1, kendall_p_value=0.4, slope=1.0, intercept=0.1, planning_sd=1.0)
    base.update(changes)
    return VerdictInputs(**base)


def test_verdict_carries_over_when_the_equivalence_interval_is_inside_the_limit():
    assert decide_verdict(_inputs(), SETTINGS).verdict == "carries_over"


def test_verdict_is_not_carries_over_when_residuals_exceed_too_often():
    v = decide_verdict(_inputs(residual_exceedances=4, residual_p_value=0.001), SETTINGS)
    assert v.verdict == "does_not_carry_over"
    assert "residual limit" in v.reason


def test_verdict_offset_order_kept_states_offset_and_scale():
    v = decide_verdict(_inputs(bias=2.0, test_interval=(1.4, 2.6), equivalence_interval=(1.5, 2.5),
                               kendall=0.8, kendall_p_value=0.01, slope=1.3, intercept=1.9), SETTINGS)
    assert v.verdict == "offset_order_kept"
    assert "bias 2" in v.reason and "1.3 x simulation" in v.reason


def test_verdict_does_not_carry_over_when_offset_is_large_and_order_poor():
    v = decide_verdict(_inputs(bias=2.0, test_interval=(1.4, 2.6), equivalence_interval=(1.5, 2.5),
                               kendall=0.1, kendall_p_value=0.4), SETTINGS)
    assert v.verdict == "does_not_carry_over"


def test_verdict_does_not_carry_over_when_offset_is_large_and_order_untested():
    v = decide_verdict(_inputs(n_trials=2, bias=2.0, test_interval=(1.4, 2.6),
                               equivalence_interval=(1.5, 2.5), kendall=math.nan, kendall_p_value=math.nan),
                       SETTINGS)
    assert v.verdict == "does_not_carry_over"
    assert "untested" in v.reason


def test_verdict_undecided_when_interval_straddles_the_limit():
    v = decide_verdict(_inputs(n_trials=3, bias=0.6, test_interval=(-0.8, 2.0),
                               equivalence_interval=(-0.5, 1.7)), SETTINGS)
    assert v.verdict == "undecided"
    assert v.more_trials is not None and v.more_trials >= 1


def test_verdict_significant_but_small_offset_is_not_does_not_carry_over():
    # significant (interval excludes 0) but the estimate is inside the limit and equivalence not shown
    v = decide_verdict(_inputs(n_trials=4, bias=0.8, test_interval=(0.1, 1.5),
                               equivalence_interval=(0.2, 1.4)), SETTINGS)
    assert v.verdict == "undecided"


def test_verdict_with_one_trial_is_undecided():
    v = decide_verdict(_inputs(n_trials=1, test_interval=(math.nan, math.nan),
                               equivalence_interval=(math.nan, math.nan)), SETTINGS)
    assert v.verdict == "undecided" and v.more_trials >= 1


def test_feature_without_simulated_spread_gets_a_verdict_without_warnings():
    # "fell" when nothing falls: zero spread everywhere; no division by zero may surface.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        same = feature_shift("fell", np.zeros(5), np.zeros((5, K)), SETTINGS, np.random.default_rng(0))
        differ = feature_shift("fell", np.ones(5), np.zeros((5, K)), SETTINGS, np.random.default_rng(0))
    assert same.verdict == "carries_over" and "no spread" in same.reason
    # 5 of 5 differ where each may with probability at most 2/33: binomial tail far below 0.05
    assert differ.verdict == "does_not_carry_over"


# ---- the typed result ---------------------------------------------------------------------------


def _three_features(seed: int = 40) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    n, p = 5, 3
    location = rng.normal(0, 3, size=(n, 1, p))
    sims = location + rng.standard_normal((n, K, p))
    hardware = location[:, 0, :] + rng.standard_normal((n, p))
    sims[:, :, 2] = 0.0
    hardware[:, 2] = 0.0
    sims[1, 3, 0] = np.nan  # a diverged simulation
    return hardware, sims


def test_report_carries_every_section_and_is_reproducible_from_its_seed():
    hardware, sims = _three_features()
    names = ["a", "b", "fell"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report = shift_from_arrays(hardware, sims, names, SETTINGS, 7, hardware_objective=hardware[:, 0],
                                   simulated_objective=sims[:, :, 0])
    assert [f.name for f in report.features] == names
    assert all(f.verdict in VERDICTS for f in report.features)
    assert report.joint.features == ["a", "b"]  # the zero-spread feature is left out of the joint tests
    assert 0 < report.joint.mmd_p_value <= 1 and 0 < report.joint.classifier_p_value <= 1
    assert report.settings.level == SETTINGS.level and report.settings.offset_limit == SETTINGS.offset_limit
    assert math.isfinite(report.objective.rank.kendall)
    assert report.seed == 7
    again = shift_from_arrays(hardware, sims, names, SETTINGS, 7, hardware_objective=hardware[:, 0],
                              simulated_objective=sims[:, :, 0])
    assert again.to_json() == report.to_json()


def test_report_round_trips_through_strict_json_with_its_arrays():
    hardware, sims = _three_features(41)
    report = shift_from_arrays(hardware, sims, ["a", "b", "fell"], SETTINGS, 3, trial_ids=[4, 5, 6, 7, 8])
    text = json.dumps(report.to_dict(), allow_nan=False)  # strict JSON: no NaN literal
    back = ShiftReport.from_dict(json.loads(text))
    assert isinstance(back.joint, JointShift) and isinstance(back.features[0], FeatureShift)
    assert isinstance(back.features[0].rank, RankAgreement)
    assert isinstance(back.features[0].bias_test_interval, tuple)
    assert back.objective is None and back.trial_ids == [4, 5, 6, 7, 8]
    np.testing.assert_array_equal(back.hardware_values, hardware)
    np.testing.assert_array_equal(back.simulated_values, sims)  # NaN in the same places
    assert back.simulated_values.shape == (5, K, 3)
    assert back.to_json() == report.to_json()


# ---- the job on a real store ----------------------------------------------------------------------


def _store_with_trials(path: Path, scenario, rng: np.random.Generator, trials: int = 4, k: int = 16) -> Store:
    """A store holding ``trials`` hardware trials, each with ``k`` matched simulations (the last diverged)."""
    names = list(scenario.features.names)
    physics_names = tuple(r.name for r in scenario.physics)
    store = Store(path)
    for i in range(trials):
        run_id = store.start_run("match", scenario, seed=i, design="match", planned=k, nominal=False)
        location = rng.normal(5.0, 2.0, size=len(names))
        features = {name: location[j] + rng.standard_normal(k) for j, name in enumerate(names)}
        features["fell"] = np.zeros(k)
        status = np.array(["ok"] * (k - 1) + ["diverged"])
        for name in names:  # a diverged rollout has no features (records.RolloutBatch)
            features[name][-1] = np.nan
        batch = RolloutBatch(np.arange(k), np.zeros((k, len(scenario.parameters))), np.ones((k, len(physics_names))),
                             physics_names, status, np.array([""] * (k - 1) + ["nan state"]),
                             rng.normal(size=k), features)
        store.write_rollouts(run_id, batch)
        hardware = {name: float(location[j] + rng.standard_normal()) for j, name in enumerate(names)}
        hardware["fell"] = 0.0
        trial_id, _ = store.add_trial(TrialRecord(
            scenario_hash=scenario.content_hash, source_path=f"t{i}.csv", sha256=f"{i:064x}",
            params={p.name: 0.0 for p in scenario.parameters}, robot_id="r", recorded_at="", outcome="stood",
            notes="", synthetic=True, features=hardware, objective=float(rng.normal()),
        ))
        store.link_matches(trial_id, run_id, range(k))
    return store


def test_assess_shift_reads_a_store_saves_the_result_and_writes_json_and_plots(tmp_path):
    # Store contract (DEVELOPERS.md): trials(hash) -> TrialRecord list; matches(id) -> RolloutBatch of K rows.
    scenario = load_scenario(SCENARIO_PATH)
    names = list(scenario.features.names)
    store = _store_with_trials(tmp_path / "store.sqlite", scenario, np.random.default_rng(50))
    report = assess_shift(scenario, store, seed=1, json_path=tmp_path / "s.json", plots_dir=tmp_path / "plots")
    data = json.loads((tmp_path / "s.json").read_text())
    assert data["kind"] == "shift" and [f["name"] for f in data["features"]] == names
    assert report.trial_ids == [t.id for t in store.trials(scenario.content_hash)]
    assert report.simulated_values.shape == (4, 15, len(names))  # the diverged rows are left out
    assert any("diverged" in note for note in report.notes)
    assert report.feature("fell").verdict == "carries_over"
    assert report.scenario.hash == scenario.content_hash
    assert all((tmp_path / "plots" / f"shift_{n}.png").read_bytes()[:4] == b"\x89PNG" for n in names)
    stored = store.load_result(ShiftReport, scenario.content_hash)
    assert stored is not None and stored.to_json() == report.to_json()
    store.close()


def test_assess_shift_takes_paths_for_the_scenario_and_the_store(tmp_path):
    scenario = load_scenario(SCENARIO_PATH)
    _store_with_trials(tmp_path / "store.sqlite", scenario, np.random.default_rng(51), trials=3).close()
    report = assess_shift(SCENARIO_PATH, tmp_path / "store.sqlite", seed=2)
    assert report.seed == 2 and len(report.trial_ids) == 3


def test_assess_shift_without_trials_says_to_ingest_them(tmp_path):
    Store(tmp_path / "empty.sqlite").close()
    with pytest.raises(ModelError, match="ingest"):
        assess_shift(SCENARIO_PATH, tmp_path / "empty.sqlite")


def test_assess_shift_on_a_missing_store_is_a_store_error(tmp_path):
    with pytest.raises(StoreError, match="store not found"):
        assess_shift(SCENARIO_PATH, tmp_path / "none.sqlite")


def test_assess_shift_refuses_a_level_outside_0_to_half_naming_the_argument(tmp_path):
    with pytest.raises(ModelError, match="level argument"):
        assess_shift(SCENARIO_PATH, tmp_path / "none.sqlite", level=0.7)
