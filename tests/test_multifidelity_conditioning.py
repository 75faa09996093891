"""Hardware trials shrink the multi-fidelity prior's uncertainty where they were run.

The simulation level's posterior is part of the hardware level's prior covariance (Kennedy and O'Hagan
2000; Le Gratiet and Garnier 2014), so conditioning on a hardware trial at ``x`` reduces the latent
variance there like any GP observation (Rasmussen and Williams 2006, eq. 2.26).
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from gapgauge.compare.multifidelity import MultiFidelityGP


def forrester_high(x: np.ndarray) -> np.ndarray:
    return (6 * x - 2) ** 2 * np.sin(12 * x - 4)


def forrester_low(x: np.ndarray) -> np.ndarray:
    return 0.5 * forrester_high(x) + 10 * (x - 0.5) - 5


# few, noisy simulated points: the simulation level is uncertain between them, which the old model kept
# as per-trial noise that no hardware trial could remove
X_LOW = np.linspace(0.0, 1.0, 7)[:, None]
X_TRIAL = np.array([[0.58]])  # between two simulated points
REPEATS = (1, 4, 16)


def _noisy_low() -> np.ndarray:
    rng = np.random.default_rng(3)
    return forrester_low(X_LOW[:, 0]) + 1.0 * rng.normal(size=X_LOW.shape[0])


@pytest.mark.parametrize("sparse", [False, True], ids=["exact_low", "sparse_low"])
def test_latent_sd_at_a_tried_point_shrinks_as_gp_conditioning_says(sparse: bool) -> None:
    fitted = MultiFidelityGP(random_state=0, sparse_threshold=3 if sparse else 500, max_inducing=5).fit(
        X_LOW, _noisy_low(), X_TRIAL, forrester_high(X_TRIAL[:, 0])
    )
    assert type(fitted.low_).__name__ == ("SparseGP" if sparse else "ExactGP")
    # the same hyperparameters throughout (kriging believer), so only the data change
    prior = fitted.copy_with_high(np.empty((0, 1)), np.empty(0), optimize=False)
    _, prior_sd = prior.predict(X_TRIAL, return_std=True)
    noise_var = fitted.hardware_noise_sd_**2
    prior_var = float(prior_sd[0] ** 2)
    # the simulation level's own uncertainty is a real part of the prior variance here
    assert fitted.predict_low(X_TRIAL, return_std=True)[1][0] ** 2 > 4 * noise_var
    for n in REPEATS:
        X = np.repeat(X_TRIAL, n, axis=0)
        model = fitted.copy_with_high(X, np.full(n, forrester_high(X_TRIAL[0, 0])), optimize=False)
        _, sd = model.predict(X_TRIAL, return_std=True)
        # R&W eq. 2.26 for n observations at one point with prior variance v and noise s^2:
        # v - v 1^T (v 11^T + s^2 I)^-1 1 v = v s^2 / (s^2 + n v), below both v and s^2 / n
        expected = prior_var * noise_var / (noise_var + n * prior_var)
        assert sd[0] < prior_sd[0]
        assert sd[0] ** 2 == pytest.approx(expected, rel=1e-6)
        assert sd[0] <= np.sqrt(noise_var / n) * (1 + 1e-9)


@pytest.mark.parametrize("sparse", [False, True], ids=["exact_low", "sparse_low"])
def test_stored_state_rebuilds_the_simulation_posterior_term_without_refitting(sparse: bool) -> None:
    # through JSON text and an npz file, as the store keeps it (no pickle): C_low comes back from the
    # stored simulation level, so predictions at and away from the trials are the same numbers
    X_high = np.array([[0.1], [0.58], [0.9]])
    fitted = MultiFidelityGP(random_state=0, sparse_threshold=3 if sparse else 500, max_inducing=5).fit(
        X_LOW, _noisy_low(), X_high, forrester_high(X_high[:, 0])
    )
    params, arrays = fitted.to_state()
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as npz:
        rebuilt = MultiFidelityGP.from_state(json.loads(json.dumps(params)), dict(npz))
    x = np.linspace(0.0, 1.0, 31)[:, None]
    for a, b in zip(rebuilt.predict(x, return_std=True), fitted.predict(x, return_std=True), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("sparse", [False, True], ids=["exact_low", "sparse_low"])
def test_posterior_covariance_is_gaussian_conditioning_of_the_prior_covariance(sparse: bool) -> None:
    # R&W eq. 2.24 on the joint prior of the trials and query points (hyperparameters fixed, as the kriging
    # believer keeps them): Sigma_qq - Sigma_qt (Sigma_tt + s^2 I)^-1 Sigma_tq, cross-covariances included
    X_high = np.array([[0.1], [0.58], [0.9]])
    y_high = forrester_high(X_high[:, 0])
    fitted = MultiFidelityGP(random_state=0, sparse_threshold=3 if sparse else 500, max_inducing=5).fit(
        X_LOW, _noisy_low(), X_high, y_high
    )
    prior = fitted.copy_with_high(np.empty((0, 1)), np.empty(0), optimize=False)
    X_query = np.array([[0.05], [0.3], [0.6], [0.75]])
    _, joint = prior.predict(np.vstack([X_high, X_query]), return_cov=True)
    t, q = slice(0, 3), slice(3, None)
    noise_var = fitted.hardware_noise_sd_**2
    expected = joint[q, q] - joint[q, t] @ np.linalg.solve(joint[t, t] + noise_var * np.eye(3), joint[t, q])
    _, cov = fitted.predict(X_query, return_cov=True)
    np.testing.assert_allclose(cov, expected, rtol=1e-6, atol=1e-9 * np.max(np.abs(expected)))
