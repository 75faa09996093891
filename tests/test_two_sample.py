"""Joint two-sample tests (compare/two_sample.py) against their published definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import pdist

from gapgauge.compare.two_sample import (
    classifier_matched_test,
    gaussian_kernel,
    median_heuristic,
    mmd2_unbiased,
    mmd_matched_test,
)

REPETITIONS = 200
LEVEL = 0.05
# Under the null the number of rejections in 200 independent level-0.05 tests is Binomial(200, 0.05);
# the central 99% of that distribution (scipy.stats.binom.interval) is the accepted band.
BAND = stats.binom.interval(0.99, REPETITIONS, LEVEL)


def _null_matched_sets(rng: np.random.Generator, n: int, k: int, p: int) -> tuple[np.ndarray, np.ndarray]:
    """n matched sets; in each, hardware and its k simulations are iid draws of one distribution
    whose location and scale differ from set to set (the parameters differ between trials)."""
    location = rng.normal(0.0, 3.0, size=(n, 1, p))
    scale = rng.uniform(0.5, 2.0, size=(n, 1, p))
    draws = location + scale * rng.standard_normal((n, k + 1, p))
    return draws[:, 0, :], draws[:, 1:, :]


def test_mmd2_unbiased_equals_gretton_eq3_by_explicit_double_loops():
    # Gretton et al. (2012), JMLR 13:723-773, eq. (3): the unbiased MMD^2_u, written out term by term.
    x = np.array([[0.0, 0.0], [1.0, 0.5], [0.2, -1.0]])
    y = np.array([[2.0, 1.0], [1.5, 1.5], [0.5, 0.0], [3.0, -0.5]])
    width = 0.8

    def k(a, b):
        return math.exp(-sum((ai - bi) ** 2 for ai, bi in zip(a, b, strict=True)) / (2 * width**2))

    m, n = len(x), len(y)
    xx = sum(k(x[i], x[j]) for i in range(m) for j in range(m) if i != j) / (m * (m - 1))
    yy = sum(k(y[i], y[j]) for i in range(n) for j in range(n) if i != j) / (n * (n - 1))
    xy = sum(k(x[i], y[j]) for i in range(m) for j in range(n)) / (m * n)
    assert mmd2_unbiased(x, y, width) == pytest.approx(xx + yy - 2 * xy, rel=1e-12, abs=1e-14)


def test_gaussian_kernel_is_exp_of_minus_squared_distance_over_two_width_squared():
    # Gretton et al. (2012), section 8: k(x, y) = exp(-|x - y|^2 / (2 sigma^2)).
    x = np.array([[0.0, 1.0]])
    y = np.array([[3.0, 5.0]])
    assert gaussian_kernel(x, y, 2.0)[0, 0] == pytest.approx(math.exp(-25.0 / 8.0), rel=1e-12)


def test_median_heuristic_is_the_median_pairwise_euclidean_distance():
    # Gretton et al. (2012), section 8; scipy.spatial.distance.pdist gives the pairwise distances.
    points = np.random.default_rng(3).normal(size=(15, 3))
    assert median_heuristic(points) == pytest.approx(float(np.median(pdist(points))), rel=1e-10)


@pytest.mark.slow
def test_mmd_permutation_test_rejects_about_five_percent_under_the_null():
    # Gretton et al. (2012): a level-0.05 permutation test rejects ~5% of the time under the null.
    rng = np.random.default_rng(20240611)
    rejections = 0
    for _ in range(REPETITIONS):
        hardware, simulated = _null_matched_sets(rng, n=5, k=16, p=3)
        result = mmd_matched_test(hardware, simulated, permutations=200, rng=rng)
        rejections += result.p_value < LEVEL
    assert BAND[0] <= rejections <= BAND[1], (rejections, BAND)


@pytest.mark.slow
def test_classifier_test_rejects_about_five_percent_under_the_null():
    # Lopez-Paz and Oquab (2017): under the null the classifier is at chance (AUC ~ 0.5) and a level-0.05
    # test rejects ~5% of the time.
    rng = np.random.default_rng(7)
    rejections = 0
    aucs = []
    for _ in range(REPETITIONS):
        hardware, simulated = _null_matched_sets(rng, n=5, k=16, p=3)
        result = classifier_matched_test(hardware, simulated, rng=rng, permutations=200, bootstrap=200)
        rejections += result.p_value < LEVEL
        aucs.append(result.auc)
    assert BAND[0] <= rejections <= BAND[1], (rejections, BAND)
    # the mean AUC of 200 null runs is 0.5 within 4 standard errors
    assert abs(np.mean(aucs) - 0.5) < 4 * np.std(aucs) / math.sqrt(REPETITIONS)


def test_both_joint_tests_detect_a_two_sd_shift_in_one_feature_with_eight_trials():
    # Gretton et al. (2012), Lopez-Paz and Oquab (2017): a clear shift gives a small p-value.
    rng = np.random.default_rng(11)
    hardware, simulated = _null_matched_sets(rng, n=8, k=32, p=3)
    _, sims_scale = simulated.mean(axis=1), simulated.std(axis=1)
    hardware[:, 0] += 2.0 * sims_scale[:, 0]
    assert mmd_matched_test(hardware, simulated, permutations=500, rng=rng).p_value < LEVEL
    assert classifier_matched_test(hardware, simulated, rng=rng).p_value < LEVEL


def test_mmd_is_unchanged_by_the_order_of_simulations_within_a_set():
    # The statistic is a function of the sets, not of how the K simulations are listed.
    rng = np.random.default_rng(5)
    hardware, simulated = _null_matched_sets(rng, n=4, k=10, p=2)
    first = mmd_matched_test(hardware, simulated, permutations=10, rng=np.random.default_rng(0)).mmd2
    shuffled = simulated[:, rng.permutation(10), :]
    second = mmd_matched_test(hardware, shuffled, permutations=10, rng=np.random.default_rng(0)).mmd2
    assert first == pytest.approx(second, rel=1e-12)
