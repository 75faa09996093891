"""Feature shift (compare/shift.py): figures against scipy, verdicts by repetition and on built cases."""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from gapgauge.compare.shift import (
    VERDICTS,
    VerdictInputs,
    decide_verdict,
    feature_shift,
    ks_statistic,
    shift_from_arrays,
    t_test_power,
    trials_to_decide,
    wasserstein_1d,
)
from gapgauge.scenario import ShiftSettings

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


def test_wasserstein_equals_scipy_wasserstein_distance():
    # Reference: scipy.stats.wasserstein_distance (W1 between empirical distributions), with ties.
    rng = np.random.default_rng(1)
    u = np.round(rng.normal(size=7), 1)
    v = np.round(rng.normal(0.5, 2.0, size=40), 1)
    assert wasserstein_1d(u, v) == pytest.approx(stats.wasserstein_distance(u, v), rel=1e-12)


def test_ks_statistic_equals_scipy_ks_2samp():
    # Reference: scipy.stats.ks_2samp statistic, with ties.
    rng = np.random.default_rng(2)
    u = np.round(rng.normal(size=6), 1)
    v = np.round(rng.normal(0.3, 1.0, size=50), 1)
    assert ks_statistic(u, v) == pytest.approx(stats.ks_2samp(u, v).statistic, rel=1e-12)


def test_feature_figures_compare_hardware_with_the_pooled_matched_simulations():
    # The feature's Wasserstein and KS figures are scipy's on (hardware values, all matched simulations).
    hardware, sims = _matched(np.random.default_rng(3), 5, shift_sd=0.5)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    assert result.wasserstein == pytest.approx(stats.wasserstein_distance(hardware, sims.ravel()), rel=1e-12)
    assert result.ks_statistic == pytest.approx(stats.ks_2samp(hardware, sims.ravel()).statistic, rel=1e-12)
    assert result.ks_p_value == pytest.approx(stats.ks_2samp(hardware, sims.ravel()).pvalue, rel=1e-9)


def test_residuals_and_bias_follow_their_definitions():
    # Definitions (DESIGN.md section 5): residual = (hw - mean_sim) / sd_sim (sample sd);
    # bias = mean(hw - mean_sim).
    hardware, sims = _matched(np.random.default_rng(4), 4)
    result = feature_shift("x", hardware, sims, SETTINGS, np.random.default_rng(0))
    expected = (hardware - sims.mean(axis=1)) / sims.std(axis=1, ddof=1)
    np.testing.assert_allclose(result.residuals, expected, rtol=1e-12)
    assert result.bias == pytest.approx(float(np.mean(hardware - sims.mean(axis=1))), rel=1e-12)
    # the Student t interval of the bias: scipy.stats.t.interval on the paired differences
    d = hardware - sims.mean(axis=1)
    t_ref = stats.t.interval(0.95, len(d) - 1, loc=d.mean(), scale=stats.sem(d))
    np.testing.assert_allclose(result.bias_interval_t, t_ref, rtol=1e-10)


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


def test_report_json_carries_every_section_and_is_reproducible_from_its_seed():
    rng = np.random.default_rng(40)
    n, p = 5, 3
    location = rng.normal(0, 3, size=(n, 1, p))
    sims = location + rng.standard_normal((n, K, p))
    hardware = location[:, 0, :] + rng.standard_normal((n, p))
    sims[:, :, 2] = 0.0
    hardware[:, 2] = 0.0
    sims[1, 3, 0] = np.nan  # a diverged simulation
    names = ["a", "b", "fell"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report = shift_from_arrays(hardware, sims, names, SETTINGS, 7, hardware_objective=hardware[:, 0],
                                   simulated_objective=sims[:, :, 0])
    data = json.loads(json.dumps(report.as_dict(), allow_nan=False))
    assert [f["name"] for f in data["features"]] == names
    assert all(f["verdict"] in VERDICTS for f in data["features"])
    assert {"mmd_p_value", "classifier_auc", "classifier_p_value", "mmd2"} <= set(data["joint"])
    assert data["joint"]["features"] == ["a", "b"]  # the zero-spread feature is left out of the joint tests
    assert {"level", "residual_limit", "offset_limit", "rank_threshold"} <= set(data["settings"])
    assert data["objective"]["rank"]["kendall"] is not None
    assert data["seed"] == 7
    again = shift_from_arrays(hardware, sims, names, SETTINGS, 7, hardware_objective=hardware[:, 0],
                              simulated_objective=sims[:, :, 0])
    assert json.dumps(again.as_dict()) == json.dumps(report.as_dict())


def test_assess_shift_reads_trials_and_matches_from_a_store_and_writes_json_and_plots(tmp_path):
    # Store contract (DEVELOPERS.md): trials(hash) -> TrialRecord list; matches(id) -> RolloutBatch of K rows.
    import gapgauge
    from gapgauge.records import RolloutBatch, TrialRecord

    scenario = gapgauge.load_scenario(SCENARIO_PATH)
    names = list(scenario.features.names)
    rng = np.random.default_rng(50)

    class MemoryStore:
        def __init__(self):
            self.batches = {}
            self.records = []
            for i in range(4):
                location = rng.normal(5.0, 2.0, size=len(names))
                sims = {n: location[j] + rng.standard_normal(16) for j, n in enumerate(names)}
                sims["fell"] = np.zeros(16)
                status = np.array(["ok"] * 15 + ["diverged"])
                self.batches[i] = RolloutBatch(np.arange(16), np.zeros((16, 1)), np.zeros((16, 1)),
                                               ("friction",), status, np.array([""] * 16),
                                               rng.normal(size=16), sims)
                hw = {n: float(location[j] + rng.standard_normal()) for j, n in enumerate(names)}
                hw["fell"] = 0.0
                self.records.append(TrialRecord(scenario.content_hash, f"t{i}.csv", str(i), {}, "r", "",
                                                "stood", "", True, hw, float(rng.normal()), id=i))

        def trials(self, scenario_hash):
            return self.records if scenario_hash == scenario.content_hash else []

        def matches(self, trial_id):
            return self.batches[trial_id]

    report = gapgauge.assess_shift(scenario, MemoryStore(), seed=1, json_path=tmp_path / "s.json",
                                   plots_dir=tmp_path / "plots")
    data = json.loads((tmp_path / "s.json").read_text())
    assert [f["name"] for f in data["features"]] == names
    assert data["trial_ids"] == [0, 1, 2, 3]
    assert any("diverged" in note for note in data["notes"])
    assert report.feature("fell").verdict == "carries_over"
    assert all((tmp_path / "plots" / f"shift_{n}.png").read_bytes()[:4] == b"\x89PNG" for n in names)


def test_assess_shift_without_trials_names_the_ingest_command():
    import gapgauge
    from gapgauge.errors import ModelError

    scenario = gapgauge.load_scenario(SCENARIO_PATH)

    class EmptyStore:
        def trials(self, scenario_hash):
            return []

    with pytest.raises(ModelError, match="gapgauge ingest"):
        gapgauge.assess_shift(scenario, EmptyStore())
