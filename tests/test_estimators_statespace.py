"""Tests of the state-space (Kalman filter likelihood, EM) estimator.

External references, named beside each check:
- statsmodels' state-space Kalman filter and smoother
  (statsmodels.tsa.statespace.mlemodel.MLEModel with design = I, transition = F,
  state_intercept = g, selection = I, state_cov = Qd, obs_cov = R; known and exact
  diffuse initialisation) and its maximum-likelihood fit of the same parameterisation;
- scipy.linalg.solve_continuous_lyapunov and scipy.linalg.expm (the one-step noise
  covariance of a stable system is P - F P F^T, P the stationary covariance);
- the monotonicity of EM (Dempster, Laird & Rubin, J. R. Stat. Soc. B 39, 1977).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from statsmodels.tsa.statespace.mlemodel import MLEModel

from fitdyn.bootstrap import _step_covariance
from fitdyn.errors import EstimationError, SamplingError, TooFewSamplesError
from fitdyn.estimators import METHODS, get_estimator
from fitdyn.estimators import statespace as ss
from fitdyn.estimators.statespace import (
    KalmanEstimator,
    diffusion_from_step,
    log_likelihood,
    smooth,
)
from fitdyn.simulate import simulate
from tests.test_estimators_discrete import make_recording

A_SPIRAL = np.array([[-0.3, 1.2], [-1.0, -0.2]])
X_STAR = np.array([2.0, -1.0])
Q_TRUE = np.array([[0.05, 0.01], [0.01, 0.04]])
R_SD = np.array([0.15, 0.1])

# one-step parameters for the likelihood checks
F1 = np.array([[0.95, 0.1], [-0.08, 0.97]])
G1 = np.array([0.1, -0.05])
QD1 = np.array([[0.02, 0.005], [0.005, 0.01]])
R1 = np.diag([0.03, 0.05])


def one_step_series(n=80, seed=0):
    """Values of x_{k+1} = F1 x_k + G1 + w, y = x + v (fixed one-step parameters)."""
    rng = np.random.default_rng(seed)
    x = np.zeros((n, 2))
    x[0] = [1.0, 2.0]
    for k in range(1, n):
        x[k] = F1 @ x[k - 1] + G1 + rng.multivariate_normal([0, 0], QD1)
    return x + rng.multivariate_normal([0, 0], R1, size=n)


def sm_model(y, F, g, Qd, R):
    """statsmodels' state-space model with the same matrices (reference library)."""
    m = MLEModel(y, k_states=2)
    m["design"] = np.eye(2)
    m["transition"] = F
    m["state_intercept"] = g
    m["selection"] = np.eye(2)
    m["state_cov"] = Qd
    m["obs_cov"] = R
    m.ssm.tolerance = 0  # no steady-state shortcut: exact recursions
    return m


def both_noises(n=300, trajectories=1, seed=3, t_end=30.0):
    x0 = np.array([[4.0, 1.0], [0.0, -3.0], [3.0, -2.5], [-1.0, 2.0]])[:trajectories]
    return simulate(
        A_SPIRAL,
        X_STAR,
        x0,
        np.linspace(0, t_end, n),
        process_noise=Q_TRUE,
        measurement_noise=R_SD,
        seed=seed,
    )


# -- the filter against statsmodels ------------------------------------------------------
def test_loglik_matches_statsmodels_known_initialisation():
    """Reference: statsmodels' Kalman filter with initialize_known."""
    y = one_step_series()
    rec = make_recording(y)
    m0 = np.array([0.5, 1.5])
    P0 = np.array([[0.3, 0.1], [0.1, 0.2]])
    m = sm_model(y, F1, G1, QD1, R1)
    m.ssm.initialize_known(m0, P0)
    ref = m.ssm.filter().llf
    ours = log_likelihood(rec, F1, G1, QD1, R1, init=(m0, P0))
    assert ours.shape == (1,)
    assert abs(ours[0] - ref) < 1e-8


def test_loglik_matches_statsmodels_diffuse_and_segments():
    """Reference: statsmodels' exact diffuse filter (initialize_diffuse), per segment."""
    y = one_step_series(90, seed=2)
    rec = make_recording(y)
    m = sm_model(y, F1, G1, QD1, R1)
    m.ssm.initialize_diffuse()
    assert abs(log_likelihood(rec, F1, G1, QD1, R1)[0] - m.ssm.filter().llf) < 1e-8
    # two gap-free segments: each starts afresh, the log-likelihoods add
    seg = np.r_[np.zeros(30, int), np.ones(60, int)]
    rec2 = make_recording(y, segment=seg, trajectory=np.zeros(90, int))
    total = 0.0
    for part in (y[:30], y[30:]):
        mm = sm_model(part, F1, G1, QD1, R1)
        mm.ssm.initialize_diffuse()
        total += mm.ssm.filter().llf
    assert abs(log_likelihood(rec2, F1, G1, QD1, R1)[0] - total) < 1e-8
    # batched: several parameter sets at once equal one at a time
    Fb = np.stack([F1, 0.9 * F1])
    both = log_likelihood(rec2, Fb, G1, QD1, R1)
    alone = log_likelihood(rec2, 0.9 * F1, G1, QD1, R1)
    assert both.shape == (2,) and abs(both[1] - alone[0]) < 1e-9


def test_smoother_matches_statsmodels():
    """Reference: statsmodels' smoother (smoothed_state, _cov, _autocov)."""
    y = one_step_series(50, seed=4)
    rec = make_recording(y)
    m0 = np.array([0.5, 1.5])
    P0 = np.array([[0.3, 0.1], [0.1, 0.2]])
    m = sm_model(y, F1, G1, QD1, R1)
    m.ssm.initialize_known(m0, P0)
    res = m.ssm.smooth()
    out = smooth(rec, F1, G1, QD1, R1, init=(m0, P0))
    assert np.allclose(out["mean"], res.smoothed_state.T, rtol=0, atol=1e-10)
    assert np.allclose(out["cov"], np.moveaxis(res.smoothed_state_cov, 2, 0), atol=1e-12)
    # statsmodels' autocov[:, :, k] is Cov(x_{k+1}, x_k | all data)
    auto = np.moveaxis(res.smoothed_state_autocov, 2, 0)[:-1]
    assert np.allclose(out["lag_one"][1:], auto, atol=1e-12)
    assert np.all(np.isnan(out["lag_one"][0]))


def test_score_is_the_gradient_of_the_loglik():
    """Fisher's identity (Louis 1982): the score from the E-step sums equals the
    numerical gradient of the log-likelihood (central differences; common practice)."""
    rec = both_noises(200)
    for eq in (None, X_STAR):
        intercept = eq is None
        lay = ss._layout(rec)
        V = rec.values[None]
        mu, sd = ss._units(V, eq)
        z = (V - mu[:, None]) / sd[:, None]
        th, _ = ss._start(rec, z, intercept, 0.01)
        th = th + 0.05 * np.random.default_rng(1).standard_normal(th.shape)
        y1, y2 = ss._lanes(lay, z)
        _, G = ss._score_batch(th, y1, y2, lay, intercept)
        k = th.shape[1]
        E = 1e-6 * np.eye(k)
        num = (
            ss._loglik(th + E, y1.repeat(k, 1), y2.repeat(k, 1), lay, intercept)
            - ss._loglik(th - E, y1.repeat(k, 1), y2.repeat(k, 1), lay, intercept)
        ) / 2e-6
        assert np.max(np.abs(num - G[0])) < 1e-6 * np.max(np.abs(G))


def test_em_never_decreases_the_likelihood():
    """Monotonicity of EM (Dempster, Laird & Rubin 1977)."""
    rec = both_noises(150)
    lay = ss._layout(rec)
    V = rec.values[None]
    mu, sd = ss._units(V, None)
    z = (V - mu[:, None]) / sd[:, None]
    th, _ = ss._start(rec, z, True, 0.01)
    y1, y2 = ss._lanes(lay, z)
    lls = []
    for _ in range(15):
        th, ll = ss._em_map(th, y1, y2, lay, True)
        lls.append(ll[0])
    assert np.all(np.diff(lls) >= -1e-9 * abs(lls[0]))


# -- the optimum against statsmodels' maximum likelihood ---------------------------------
class _SameModel(MLEModel):
    """statsmodels MLE of x_{k+1} = F x_k + g + w, y = x + v with diagonal R."""

    def __init__(self, y):
        super().__init__(y, k_states=2, initialization="diffuse")
        self["design"] = np.eye(2)
        self["selection"] = np.eye(2)
        self.ssm.tolerance = 0

    @property
    def param_names(self):
        return ["f11", "f12", "f21", "f22", "g1", "g2", "la", "c", "ld", "lr1", "lr2"]

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        f11, f12, f21, f22, g1, g2, la, c, ld, lr1, lr2 = params
        self["transition"] = np.array([[f11, f12], [f21, f22]])
        self["state_intercept"] = np.array([g1, g2])
        L = np.array([[np.exp(la), 0.0], [c, np.exp(ld)]])
        self["state_cov"] = L @ L.T
        self["obs_cov"] = np.diag([np.exp(lr1), np.exp(lr2)])


def test_em_optimum_agrees_with_statsmodels_mle():
    """Reference: statsmodels' MLEModel.fit (L-BFGS on its own Kalman likelihood)."""
    rec = both_noises(200, seed=11)
    est = KalmanEstimator().fit(rec)
    ex = est.extra
    disc = get_estimator("discrete").fit(rec)
    F0 = disc.extra["one_step_matrix"]
    g0 = disc.extra["one_step_constant"]
    rc = disc.residual_cov
    start = np.r_[
        F0.ravel(),
        g0,
        0.5 * np.log(0.5 * rc[0, 0]),
        0.0,
        0.5 * np.log(0.5 * rc[1, 1]),
        np.log(0.5 * rc[0, 0]),
        np.log(0.5 * rc[1, 1]),
    ]
    mod = _SameModel(rec.values)
    res = mod.fit(start, method="lbfgs", maxiter=2000, disp=False)
    assert ex["log_likelihood"] >= res.llf - 1e-6
    # our log-likelihood is statsmodels' at our parameters
    L = np.linalg.cholesky(ex["one_step_noise_cov"])
    ours = np.r_[
        ex["one_step_matrix"].ravel(),
        ex["one_step_constant"],
        np.log(L[0, 0]),
        L[1, 0],
        np.log(L[1, 1]),
        np.log(np.diag(ex["measurement_cov"])),
    ]
    assert abs(mod.loglike(ours) - ex["log_likelihood"]) < 1e-7
    p = res.params
    assert np.allclose(ex["one_step_matrix"].ravel(), p[:4], atol=2e-3)
    assert np.allclose(ex["one_step_constant"], p[4:6], atol=2e-3)
    assert np.allclose(np.log(np.diag(ex["measurement_cov"])), p[9:], atol=2e-2)


# -- recovery with both noises --------------------------------------------------------------
def test_recovers_A_where_the_discrete_fit_is_attenuated():
    rec = both_noises(500, trajectories=4, seed=5, t_end=50.0)
    k = get_estimator("kalman").fit(rec)
    d = get_estimator("discrete").fit(rec)
    err_k = np.max(np.abs(k.matrix - A_SPIRAL))
    err_d = np.max(np.abs(d.matrix - A_SPIRAL))
    assert err_k < 0.1
    assert err_k < 0.25 * err_d
    # the measurement noise makes the one-step fit decay too fast (attenuation)
    assert np.trace(d.matrix) < np.trace(A_SPIRAL) - 0.2
    assert np.allclose(np.diag(k.extra["measurement_cov"]), R_SD**2, rtol=0.3)
    assert np.allclose(k.extra["process_noise"], Q_TRUE, atol=0.02)
    # the asymptotic standard errors cover the truth (4 sd, all six parameters)
    assert k.param_cov is not None
    sdv = np.sqrt(np.diag(k.param_cov))
    truth = np.r_[A_SPIRAL.ravel(), -A_SPIRAL @ X_STAR]
    got = np.r_[k.matrix.ravel(), k.offset]
    assert np.all(np.abs(got - truth) < 4 * sdv)
    assert np.allclose(k.equilibrium, X_STAR, atol=0.15)


def test_estimate_fields_and_extra():
    rec = both_noises(300)
    est = KalmanEstimator().fit(rec)
    ex = est.extra
    for key in (
        "process_noise", "measurement_cov", "one_step_matrix", "one_step_noise_cov",
    ):  # fmt: skip
        assert ex[key].shape == (2, 2)
    assert np.allclose(ex["process_noise"], ex["process_noise"].T)
    assert ex["measurement_cov"][0, 1] == 0.0 == ex["measurement_cov"][1, 0]
    assert np.isfinite(ex["log_likelihood"]) and ex["step"] == pytest.approx(30 / 299)
    assert est.residuals.shape == (299, 2) and est.n_used == 299
    assert ex["smoothed_states"].shape == (300, 2)
    assert ex["initial_states"].shape == (1, 2)
    assert ex["converged"] and any("converged" in n for n in est.notes)
    assert est.settings["max_iter"] == 500 and est.settings["tol"] == 1e-9
    # A = log(F) / h and Q maps to Qd through the Van Loan integral
    assert np.allclose(scipy.linalg.expm(est.matrix * ex["step"]), ex["one_step_matrix"])
    Qd = _step_covariance(est.matrix, ex["process_noise"], ex["step"])
    assert np.allclose(Qd, ex["one_step_noise_cov"], atol=1e-10)
    # the innovations are (nearly) white under the fitted model
    e = est.residuals - est.residuals.mean(axis=0)
    lag1 = np.sum(e[1:] * e[:-1], axis=0) / np.sum(e * e, axis=0)
    assert np.all(np.abs(lag1) < 0.2)
    assert "kalman" in METHODS


def test_diffusion_from_step_inverts_the_lyapunov_step_covariance():
    """Reference: scipy.linalg.solve_continuous_lyapunov: for stable A the one-step
    covariance is P - F P F^T with A P + P A^T + Q = 0."""
    h = 0.3
    P = scipy.linalg.solve_continuous_lyapunov(A_SPIRAL, -Q_TRUE)
    F = scipy.linalg.expm(A_SPIRAL * h)
    Qd = P - F @ P @ F.T
    assert np.allclose(diffusion_from_step(A_SPIRAL, Qd, h), Q_TRUE, atol=1e-12)


def test_squarem_and_newton_reach_the_em_optimum():
    rec = both_noises(200, seed=8)
    full = KalmanEstimator().fit(rec)
    em_only = KalmanEstimator(polish=False, tol=1e-10, max_iter=3000).fit(rec)
    assert em_only.extra["converged"]
    assert np.allclose(full.matrix, em_only.matrix, atol=1e-6)
    assert full.extra["log_likelihood"] >= em_only.extra["log_likelihood"] - 1e-8


# -- batches ------------------------------------------------------------------------------------
def test_fit_values_equals_point_fits_and_is_deterministic():
    rec = both_noises(200, seed=2)
    est = KalmanEstimator()
    est.fit(rec)
    batch = simulate(
        A_SPIRAL, X_STAR, [4.0, 1.0], rec.times, process_noise=Q_TRUE,
        measurement_noise=R_SD, seed=21, replicates=4,
    )  # fmt: skip
    V = batch.values
    out = est.fit_values(rec, V)
    again = est.fit_values(rec, V)
    assert out.valid.all()
    assert np.array_equal(out.matrix, again.matrix) and np.array_equal(out.offset, again.offset)
    for k in range(V.shape[0]):
        single = est.fit_values(rec, V[k : k + 1])
        assert np.allclose(single.matrix[0], out.matrix[k], rtol=0, atol=1e-8)
        alone = KalmanEstimator().fit(rec.with_values(V[k]))
        assert np.allclose(alone.matrix, out.matrix[k], rtol=0, atol=1e-7)
        assert np.allclose(alone.offset, out.offset[k], rtol=0, atol=1e-7)
    # without a point fit on this sampling each replicate starts from its own
    # least-squares fit and reaches the same optimum
    fresh = KalmanEstimator().fit_values(rec, V)
    assert np.allclose(fresh.matrix, out.matrix, rtol=0, atol=1e-7)


def test_unconverged_replicates_are_flagged_not_dropped():
    rec = both_noises(150, seed=4)
    est = KalmanEstimator(max_iter=1, polish=False)
    V = np.stack([rec.values, rec.values[::-1].copy()])
    out = est.fit_values(rec, V)
    assert out.valid.shape == (2,) and not out.valid.any()
    assert np.all(np.isnan(out.matrix))
    fit = est.fit(rec)
    assert not fit.extra["converged"]
    assert any("did not converge" in w for w in fit.warnings)


def test_gap_equals_separate_trajectories():
    rec = both_noises(240, seed=6)
    seg = np.r_[np.zeros(100, int), np.ones(140, int)]
    one = make_recording(rec.values, rec.times, segment=seg, trajectory=np.zeros(240, int))
    two = make_recording(rec.values, rec.times, segment=seg, trajectory=seg)
    e1 = KalmanEstimator().fit(one)
    e2 = KalmanEstimator().fit(two)
    assert np.allclose(e1.matrix, e2.matrix, rtol=0, atol=1e-12)
    assert e1.n_used == e2.n_used == 238
    assert e2.extra["initial_states"].shape == (2, 2)


# -- refusals and known equilibrium -----------------------------------------------------------
def test_refuses_non_uniform_steps():
    rec = both_noises(100)
    t = rec.times.copy()
    t[50:] += 0.5 * (t[1] - t[0])
    bad = make_recording(rec.values, t)
    with pytest.raises(SamplingError, match="kalman estimator needs a uniform step"):
        KalmanEstimator().fit(bad)


def test_refuses_too_few_samples():
    rec = both_noises(15)
    with pytest.raises(TooFewSamplesError, match="needs at least 22 pairs"):
        KalmanEstimator().fit(rec)
    with pytest.raises(TooFewSamplesError):
        KalmanEstimator().fit(make_recording(rec.values[:3]))


def test_refuses_settings():
    with pytest.raises(EstimationError, match="no setting"):
        KalmanEstimator(window=3)
    with pytest.raises(EstimationError, match="max_iter"):
        KalmanEstimator(max_iter=0)
    with pytest.raises(EstimationError, match="tol"):
        KalmanEstimator(tol=-1.0)
    with pytest.raises(EstimationError, match="not a linear regression"):
        KalmanEstimator().design(both_noises(50))


def test_known_equilibrium():
    rec = both_noises(500, trajectories=2, seed=9, t_end=50.0)
    estimator = KalmanEstimator()
    est = estimator.fit(rec, X_STAR)
    assert est.equilibrium_known and np.array_equal(est.equilibrium, X_STAR)
    assert np.allclose(est.offset, -est.matrix @ X_STAR, rtol=1e-12, atol=1e-12)
    assert np.all(est.extra["one_step_constant"] == 0.0)
    assert np.max(np.abs(est.matrix - A_SPIRAL)) < 0.15
    assert any("no intercept" in n for n in est.notes)
    out = estimator.fit_values(rec, rec.values[None], X_STAR)
    assert out.valid[0] and np.allclose(out.matrix[0], est.matrix, atol=1e-8)
