"""Tests of the maximum-likelihood noise fit (fitdyn.noise).

Outside references: the exact Gaussian likelihood written densely with
scipy.stats.multivariate_normal, scipy.linalg.expm and scipy.integrate.quad_vec
(for the step covariance ``int_0^h expm(A s) Q expm(A s)^T ds``), and the
uniform-step state-space likelihood of fitdyn.estimators.statespace, itself checked
against statsmodels' Kalman filter in tests/test_estimators_statespace.py.
"""

from __future__ import annotations

import numpy as np
from scipy.integrate import quad_vec
from scipy.linalg import expm
from scipy.stats import multivariate_normal

from fitdyn.estimators.statespace import log_likelihood
from fitdyn.noise import fit_noise, noise_log_likelihood
from fitdyn.simulate import simulate
from tests.test_estimators_discrete import make_recording

A = np.array([[-0.3, 1.0], [-1.0, -0.3]])
X_STAR = np.array([1.0, -2.0])
Q = np.array([[0.3, 0.05], [0.05, 0.2]])
R = np.diag([0.04, 0.09])


def _step_cov(A: np.ndarray, Q: np.ndarray, h: float) -> np.ndarray:
    return quad_vec(lambda s: expm(A * s) @ Q @ expm(A * s).T, 0.0, h, epsabs=1e-13)[0]


def _dense_loglik(t: np.ndarray, y: np.ndarray) -> float:
    """log p(y_1..y_n | y_0) with x_0 | y_0 ~ N(y_0, R) (the diffuse start), densely."""
    n = t.size - 1
    tau = t - t[0]
    mean = np.array([X_STAR + expm(A * tau[k]) @ (y[0] - X_STAR) for k in range(1, n + 1)])
    W = [_step_cov(A, Q, tau[k]) for k in range(n + 1)]
    C = np.zeros((2 * n, 2 * n))
    for j in range(1, n + 1):
        for k in range(j, n + 1):
            Pk, Pj = expm(A * tau[k]), expm(A * tau[j])
            # x_k - x* = Phi_k (x_0 - x*) + xi_k, Cov(xi_k, xi_j) = Phi(t_k - t_j) W(t_j)
            block = Pk @ R @ Pj.T + expm(A * (tau[k] - tau[j])) @ W[j]
            if j == k:
                block = block + R
            C[2 * k - 2 : 2 * k, 2 * j - 2 : 2 * j] = block
            C[2 * j - 2 : 2 * j, 2 * k - 2 : 2 * k] = block.T
    return float(multivariate_normal(mean.ravel(), C).logpdf(y[1:].ravel()))


def test_likelihood_matches_the_dense_gaussian_on_irregular_steps():
    rng = np.random.default_rng(1)
    t = np.sort(np.r_[0.0, rng.uniform(0, 6, 11)])
    rec = simulate(A, X_STAR, [3.0, 0.0], t, process_noise=Q, measurement_cov=R, seed=2)
    got = noise_log_likelihood(rec, A, X_STAR, Q, R)
    np.testing.assert_allclose(got, _dense_loglik(t, rec.values), rtol=1e-9)


def test_likelihood_matches_the_uniform_step_state_space_filter():
    from fitdyn.simulate import discretise

    h = 0.2
    rec = simulate(A, X_STAR, [3.0, 0.0], np.arange(80) * h, process_noise=Q,
                   measurement_cov=R, seed=3)  # fmt: skip
    F, C = discretise(A, [h], Q)
    g = (np.eye(2) - F[0]) @ X_STAR
    ref = log_likelihood(rec, F[0], g, C[0], R)[0]
    # that filter adds statsmodels' constant -log(2 pi) for the diffuse first sample
    ref = ref + np.log(2 * np.pi)
    np.testing.assert_allclose(noise_log_likelihood(rec, A, X_STAR, Q, R), ref, rtol=1e-9)


def test_segments_are_independent():
    rng = np.random.default_rng(4)
    t = np.sort(np.r_[0.0, rng.uniform(0, 20, 59)])
    rec = simulate(A, X_STAR, [3.0, 0.0], t, process_noise=Q, measurement_cov=R, seed=5)
    seg = (np.arange(60) >= 25).astype(int)
    both = make_recording(rec.values, rec.times, segment=seg)
    first = make_recording(rec.values[:25], rec.times[:25])
    second = make_recording(rec.values[25:], rec.times[25:])
    total = noise_log_likelihood(both, A, X_STAR, Q, R)
    parts = noise_log_likelihood(first, A, X_STAR, Q, R) + noise_log_likelihood(
        second, A, X_STAR, Q, R
    )
    np.testing.assert_allclose(total, parts, rtol=1e-10)


def test_fit_recovers_the_noise_and_beats_its_start():
    rng = np.random.default_rng(6)
    t = np.sort(np.r_[0.0, rng.uniform(0, 400, 2399)])
    rec = simulate(A, X_STAR, [3.0, 0.0], t, process_noise=Q, measurement_cov=R, seed=7)
    start = (np.eye(2) * 0.05, np.eye(2) * 0.01)
    res = fit_noise(rec, A, X_STAR, start)
    assert res.method == "likelihood"
    np.testing.assert_allclose(res.process_noise, Q, atol=0.06)
    np.testing.assert_allclose(np.diag(res.measurement_cov), np.diag(R), rtol=0.15)
    assert res.measurement_cov[0, 1] == 0.0
    exact = noise_log_likelihood(rec, A, X_STAR, res.process_noise, res.measurement_cov)
    assert exact > noise_log_likelihood(rec, A, X_STAR, *start)
    # the objective is the exact likelihood, long records included
    np.testing.assert_allclose(res.log_likelihood, exact, rtol=1e-10)


def test_short_record_fit_is_the_exact_maximum():
    rng = np.random.default_rng(8)
    t = np.sort(np.r_[0.0, rng.uniform(0, 40, 149)])
    rec = simulate(A, X_STAR, [3.0, 0.0], t, process_noise=Q, measurement_cov=R, seed=9)
    res = fit_noise(rec, A, X_STAR, (np.eye(2) * 0.1, np.eye(2) * 0.02))
    assert res.method == "likelihood"
    best = noise_log_likelihood(rec, A, X_STAR, res.process_noise, res.measurement_cov)
    np.testing.assert_allclose(res.log_likelihood, best, rtol=1e-10)
    # a maximum: nearby noise levels are no more likely
    for scale in (0.9, 1.1):
        assert best >= noise_log_likelihood(
            rec, A, X_STAR, res.process_noise * scale, res.measurement_cov
        )
        assert best >= noise_log_likelihood(
            rec, A, X_STAR, res.process_noise, res.measurement_cov * scale
        )


def test_banded_likelihood_equals_a_kalman_filter_on_gaps_and_tiny_steps():
    # The prediction-error decomposition by a plain Kalman filter written here (Durbin
    # & Koopman 2012, ch. 4: predict, innovation, update), started at x_0 | y_0 ~
    # N(y_0, R), against the banded-precision form, on irregular steps spanning four
    # decades (tiny steps make W_k nearly singular) and three segments.
    from fitdyn.simulate import discretise

    rng = np.random.default_rng(11)
    t = np.cumsum(np.r_[0.0, 10.0 ** rng.uniform(-4, 0, 89)])
    rec0 = simulate(A, X_STAR, [3.0, 0.0], t, process_noise=Q, measurement_cov=R, seed=12)
    seg = np.repeat([0, 1, 2], [30, 1, 59])  # the one-sample segment has no density
    rec = make_recording(rec0.values, rec0.times, segment=seg)
    ref = 0.0
    for a, b in ((0, 30), (31, 90)):
        y = rec.values[a:b] - X_STAR
        F, C = discretise(A, np.diff(t[a:b]), Q)
        m, P = y[0], R.copy()
        for k in range(1, b - a):
            m, P = F[k - 1] @ m, F[k - 1] @ P @ F[k - 1].T + C[k - 1]
            S = P + R
            e = y[k] - m
            ref += -np.log(2 * np.pi) - 0.5 * (np.log(np.linalg.det(S)) + e @ np.linalg.solve(S, e))
            K = P @ np.linalg.inv(S)
            m, P = m + K @ e, (np.eye(2) - K) @ P
    np.testing.assert_allclose(noise_log_likelihood(rec, A, X_STAR, Q, R), ref, rtol=1e-8)


def test_too_short_keeps_the_start():
    rec = make_recording(np.random.default_rng(0).normal(size=(5, 2)))
    start = (np.eye(2), np.eye(2) * 0.1)
    res = fit_noise(rec, A, X_STAR, start)
    assert res.method == "moments"
    np.testing.assert_array_equal(res.process_noise, start[0])
