"""The fall model's threshold on the margin of stability and its fall probability."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import ndtr
from scipy.stats import norm
from sklearn.metrics import roc_curve

from gapgauge.compare.fall import FallModel, youden_threshold
from test_gp import _through_json_and_npz


def test_youden_threshold_reaches_the_best_j_of_scikit_learns_roc_curve() -> None:
    rng = np.random.default_rng(3)
    stood = rng.normal(0.02, 0.04, 400)
    fell = rng.normal(-0.3, 0.2, 100)
    margin = np.concatenate([stood, fell])
    outcome = np.concatenate([np.zeros(400, bool), np.ones(100, bool)])
    cut = youden_threshold(margin, outcome)
    # Reference: scikit-learn's ROC of the score -margin; Youden's J = max(tpr - fpr) (Youden 1950).
    fpr, tpr, _ = roc_curve(outcome, -margin)
    best_j = np.max(tpr - fpr)
    called = margin < cut
    j = called[outcome].mean() - called[~outcome].mean()
    assert j == pytest.approx(best_j, abs=1e-12)
    # the cut lies between the two clusters, below Hof's 0 (a body may dip below 0 and recover)
    assert -0.3 < cut < 0.02


def test_youden_threshold_is_hofs_zero_when_only_one_outcome_occurs() -> None:
    margin = np.linspace(-0.1, 0.1, 20)
    assert youden_threshold(margin, np.zeros(20, bool)) == 0.0
    assert youden_threshold(margin, np.ones(20, bool)) == 0.0


def test_fall_probability_is_the_gaussian_tail_below_the_threshold() -> None:
    rng = np.random.default_rng(0)
    X = rng.random((300, 2))
    # the margin falls linearly along x0; bodies with margin below -0.05 fell
    margin = 0.1 - 0.3 * X[:, 0] + rng.normal(0, 0.01, 300)
    fell = margin < -0.05
    model = FallModel(random_state=0).fit(X, margin, np.empty((0, 2)), np.empty(0), fell_low=fell)
    assert -0.07 < model.threshold_ < -0.03
    Xq = np.array([[0.05, 0.5], [0.95, 0.5]])
    mean, sd = model.predict(Xq, return_std=True)
    # P(fall) = E[Phi(a + b (threshold - f))], f ~ N(mean, sd^2): checked by direct quadrature
    a, b = model.calibration_
    expected = [quad(lambda f, m=m, s=s: ndtr(a + b * (model.threshold_ - f)) * norm.pdf(f, m, s),
                     m - 12 * s, m + 12 * s, points=[model.threshold_])[0] for m, s in zip(mean, sd, strict=True)]
    proba = model.predict_proba(Xq)
    # scikit-learn's classifier convention: one column per class of classes_ (stood, fell), rows sum to 1
    assert model.classes_.tolist() == [False, True]
    np.testing.assert_allclose(proba.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert np.allclose(proba[:, 1], expected, atol=1e-7)
    p = model.fall_probability(Xq)
    # with no hardware trial the discrepancy prior keeps doubt (and the floor caps how deep a fall
    # reads), but each end lies clearly on its own side
    assert p[0] < 0.2 and p[1] > 0.6


def test_a_reloaded_fall_model_gives_the_same_probabilities_margins_and_likelihood() -> None:
    # through JSON text and an npz file, as the store keeps it (no pickle): the same numbers
    rng = np.random.default_rng(1)
    X = rng.random((120, 2))
    margin = 0.1 - 0.3 * X[:, 0] + rng.normal(0, 0.01, 120)
    X_hw = np.array([[0.2, 0.4], [0.7, 0.6]])
    model = FallModel(random_state=0).fit(X, margin, X_hw, 0.1 - 0.3 * X_hw[:, 0], fell_low=margin < -0.05)
    rebuilt = FallModel.from_state(*_through_json_and_npz(*model.to_state()))
    Xq = rng.random((7, 2))
    np.testing.assert_array_equal(rebuilt.predict_proba(Xq), model.predict_proba(Xq))
    for a, b in zip(rebuilt.predict(Xq, return_cov=True), model.predict(Xq, return_cov=True), strict=True):
        np.testing.assert_array_equal(a, b)
    assert rebuilt.log_marginal_likelihood() == model.log_marginal_likelihood()
