"""Output-error trajectory fit: exactness, covariance, weights, starts, edge cases."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

import fitdyn
from fitdyn.errors import EstimationError
from fitdyn.estimators.trajectory import TrajectoryEstimator

A_SPIRAL = np.array([[-0.3, 1.2], [-1.0, -0.2]])
X_STAR = np.array([2.0, -1.0])


def spiral(n=120, noise=None, seed=0, x0=(4.0, 1.0), times=None):
    t = np.linspace(0, 12, n) if times is None else times
    return fitdyn.simulate(A_SPIRAL, X_STAR, np.array(x0), t, measurement_noise=noise, seed=seed)


def test_noise_free_irregular_times_gaps_and_trajectories():
    rng = np.random.default_rng(0)
    times = [np.sort(np.r_[0.0, rng.uniform(0, 10, 59)]) for _ in range(2)]
    rec = fitdyn.simulate(A_SPIRAL, X_STAR, [[4.0, 1.0], [-1.0, -4.0]], times)
    # cut a gap into the first trajectory: a new segment, same trajectory
    keep = ~((rec.trajectory == 0) & (rec.times > 3) & (rec.times < 5))
    rec = rec.select(keep)
    seg = rec.segment.copy()
    seg[(rec.trajectory == 0) & (rec.times >= 5)] = 2
    rec = replace(rec, segment=seg)
    assert rec.n_gaps == 1
    est = TrajectoryEstimator().fit(rec)
    assert np.allclose(est.matrix, A_SPIRAL, rtol=1e-8, atol=1e-9)
    assert np.allclose(est.equilibrium, X_STAR, rtol=1e-8)
    assert np.allclose(est.extra["initial_states"], [[4.0, 1.0], [-1.0, -4.0]], atol=1e-7)
    assert est.warnings == ()


def test_covariance_is_calibrated_under_measurement_noise():
    """lmfit's covariance (inverse J'J scaled by the reduced chi-square) matches the
    spread over repeated experiments: the output-error fit is the ML estimate under
    Gaussian measurement noise (Bard 1974, from memory)."""
    fits, sds = [], []
    for seed in range(30):
        est = TrajectoryEstimator().fit(spiral(noise=[0.1, 0.2], seed=seed))
        fits.append(np.r_[est.matrix.ravel(), est.offset])
        sds.append(np.sqrt(np.diag(est.param_cov)))
    ratio = np.std(fits, axis=0, ddof=1) / np.median(sds, axis=0)
    assert np.all((ratio > 0.65) & (ratio < 1.5)), ratio


def test_known_noise_sd_gives_unscaled_covariance():
    rec = spiral(noise=[0.1, 0.2], seed=1)
    est = TrajectoryEstimator().fit(rec)
    known = TrajectoryEstimator(noise_sd=(0.1, 0.2)).fit(rec)
    assert any("not scaled" in n for n in known.notes)
    assert any("scaled by the reduced chi-square" in n for n in est.notes)
    assert np.allclose(known.extra["weights"], [10.0, 5.0])
    # with the true noise sd the unscaled covariance is close to the scaled one
    r = np.sqrt(np.diag(known.param_cov) / np.diag(est.param_cov))
    assert np.all((r > 0.8) & (r < 1.25))
    assert np.allclose(known.matrix, est.matrix, atol=0.02)


def test_weights_setting():
    est = TrajectoryEstimator(weights=(1.0, 3.0)).fit(spiral(noise=0.1, seed=2))
    assert np.allclose(est.extra["weights"], [1.0, 3.0])
    assert any("given weights" in n for n in est.notes)


def test_frequency_starts_for_oscillatory_data():
    rec = spiral(noise=0.1, seed=3)
    est = TrajectoryEstimator().fit(rec)
    assert len(est.extra["starts"]) == 5
    assert est.extra["iterations"] > 0
    single = TrajectoryEstimator(frequencies=()).fit(rec)
    assert len(single.extra["starts"]) == 1
    assert np.allclose(single.matrix, est.matrix, atol=1e-6)


def test_trajectory_along_an_eigenvector_reports_unidentified_parameters():
    # data along one eigenvector only determine A v = lambda v (common practice, no source)
    P = np.array([[1.0, 0.5], [0.2, 1.0]])
    lam = np.array([-0.4, -1.3])
    A = P @ np.diag(lam) @ np.linalg.inv(P)
    xs = np.array([1.0, -1.0])
    rec = fitdyn.simulate(A, xs, xs + 2 * P[:, 0], np.linspace(0, 8, 100))
    est = TrajectoryEstimator().fit(rec)
    assert est.param_cov is None
    assert any("unidentified" in w for w in est.warnings)
    assert np.allclose(est.matrix @ P[:, 0], lam[0] * P[:, 0], atol=1e-6)


def test_singular_matrix_is_fitted_by_offset():
    # conservation x1 + x2 = const: a line of equilibria, det A = 0
    A = np.array([[-0.4, 0.1], [0.4, -0.1]])
    rec = fitdyn.simulate(A, None, [[1.0, 0.0], [0.5, 1.5]], np.linspace(0, 15, 151))
    est = TrajectoryEstimator().fit(rec)
    assert est.extra["parameterisation"] == "offset"
    assert est.equilibrium is None
    assert np.isclose(-np.trace(est.matrix), 0.5, rtol=1e-7)


def test_report_and_extra():
    est = TrajectoryEstimator().fit(spiral(noise=0.1, seed=4))
    report = est.extra["lmfit_report"]
    assert "[[Variables]]" in report and "a11" in report and "xs1" in report
    assert est.extra["initial_states"].shape == (1, 2)
    assert est.residuals.shape == (120, 2)


def test_fit_values_without_a_point_fit_and_with_one():
    rec = spiral(noise=0.1, seed=5)
    rng = np.random.default_rng(6)
    V = rec.values[None] + 0.05 * rng.standard_normal((2, *rec.values.shape))
    fresh = TrajectoryEstimator().fit_values(rec, V)
    estimator = TrajectoryEstimator()
    estimator.fit(rec)
    warm = estimator.fit_values(rec, V)
    assert fresh.valid.all() and warm.valid.all()
    assert np.allclose(fresh.matrix, warm.matrix, atol=1e-5)


def test_unstable_spiral_over_a_long_span():
    A = np.array([[0.15, 1.0], [-1.0, 0.1]])
    rec = fitdyn.simulate(
        A, [0.0, 0.0], [0.1, 0.0], np.linspace(0, 30, 200), measurement_noise=0.02, seed=7
    )
    est = TrajectoryEstimator().fit(rec)
    assert np.allclose(est.matrix, A, atol=0.01)


def test_not_a_regression():
    est = TrajectoryEstimator()
    assert est.is_regression is False
    with pytest.raises(EstimationError, match="not a linear regression"):
        est.design(spiral())


@pytest.mark.parametrize(
    "settings",
    [
        {"start": "nowhere"},
        {"weights": (1.0, -1.0)},
        {"noise_sd": (0.1, 0.1), "weights": (1.0, 1.0)},
        {"frequencies": (0.0,)},
    ],
)
def test_invalid_settings(settings):
    with pytest.raises(EstimationError):
        TrajectoryEstimator(**settings)
