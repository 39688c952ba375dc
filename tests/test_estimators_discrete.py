"""Tests of the discrete-time (one-step least squares + log map) estimator.

External references, named beside each check:
- statsmodels' VAR (statsmodels.tsa.api.VAR(...).fit(1, trend=...)) on statsmodels'
  bundled datasets danish_data and interest_inflation;
- scipy.linalg.logm and scipy.linalg.expm.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm
from statsmodels.tsa.api import VAR

from fitdyn import linalg2
from fitdyn.errors import (
    EstimationError,
    NoRealLogarithmError,
    SamplingError,
    TooFewSamplesError,
)
from fitdyn.estimators import get_estimator
from fitdyn.estimators.discrete import DiscreteEstimator, bias_correction
from fitdyn.recording import KEPT, CleaningLog, Recording, RowFate
from fitdyn.simulate import simulate

NODE = np.array([[-0.35, 0.30], [0.15, -0.20]])  # eigenvalues -0.05, -0.5
SPIRAL = np.array([[-0.2, 1.0], [-1.0, -0.1]])
SADDLE = np.array([[0.2, 1.5], [-0.04, -0.5]])
UNSTABLE_SPIRAL = np.array([[0.1, -1.0], [1.0, 0.05]])


def make_recording(values, times=None, segment=None, trajectory=None, source="test"):
    """A Recording straight from arrays (every sample kept)."""
    values = np.asarray(values, dtype=float)
    n = values.shape[0]
    times = np.arange(n, dtype=float) if times is None else np.asarray(times, dtype=float)
    segment = np.zeros(n, dtype=int) if segment is None else np.asarray(segment)
    trajectory = segment.copy() if trajectory is None else np.asarray(trajectory)
    log = CleaningLog(source, tuple(RowFate(i, KEPT) for i in range(n)))
    return Recording(
        times=times,
        values=values,
        trajectory=trajectory,
        segment=segment,
        outlier=np.zeros(n, dtype=bool),
        source_rows=np.arange(n),
        channels=("x1", "x2"),
        units=(None, None),
        time_unit=None,
        trajectory_names=tuple(str(k) for k in range(int(trajectory.max()) + 1)),
        log=log,
        source=source,
    )


# -- statsmodels VAR(1) with a constant on statsmodels' bundled datasets -----------------
def _danish():
    # statsmodels.datasets.danish_data: log real money (lrm) and log real income (lry),
    # quarterly 1974-1987; step h = 1 quarter
    return sm.datasets.danish_data.load_pandas().data[["lrm", "lry"]].to_numpy()


def test_matches_statsmodels_var_on_danish_data():
    data = _danish()
    rec = make_recording(data, source="danish_data")
    est = DiscreteEstimator().fit(rec)
    # reference: statsmodels.tsa.api.VAR(data).fit(1, trend='c')
    res = VAR(data).fit(1, trend="c")
    F_ref = res.params[1:].T
    g_ref = res.params[0]
    assert np.all(np.linalg.eigvals(F_ref).real > 0)  # a real logarithm exists here
    np.testing.assert_allclose(est.extra["one_step_matrix"], F_ref, atol=1e-8, rtol=0)
    np.testing.assert_allclose(est.extra["one_step_constant"], g_ref, atol=1e-8, rtol=0)
    np.testing.assert_allclose(est.residual_cov, res.sigma_u, atol=1e-12, rtol=1e-8)
    # OLS covariance of (F, g): statsmodels orders (regressor, equation), const first
    cp = np.asarray(res.cov_params())
    order = [4, 5, 0, 2, 1, 3]  # const-eq1, const-eq2, y1-eq1, y1-eq2, y2-eq1, y2-eq2
    mine = est.extra["one_step_covariance"][np.ix_(order, order)]
    np.testing.assert_allclose(mine, cp, rtol=1e-8, atol=1e-14)
    # implied A against scipy.linalg.logm(F) / h, h = 1 quarter
    np.testing.assert_allclose(est.matrix, scipy.linalg.logm(F_ref).real, atol=1e-8, rtol=0)
    # equilibrium (I - F)^{-1} g and b = -A x*
    xs = np.linalg.solve(np.eye(2) - F_ref, g_ref)
    np.testing.assert_allclose(est.equilibrium, xs, rtol=1e-7)
    np.testing.assert_allclose(est.offset, -est.matrix @ xs, rtol=1e-7, atol=1e-10)
    assert est.extra["step"] == 1.0


def test_known_equilibrium_matches_statsmodels_var_without_constant():
    data = _danish()
    xs = data.mean(axis=0)
    rec = make_recording(data, source="danish_data")
    est = DiscreteEstimator().fit(rec, equilibrium=xs)
    # reference: statsmodels VAR(1) without constant on the deviations, trend='n'
    res = VAR(data - xs).fit(1, trend="n")
    np.testing.assert_allclose(est.extra["one_step_matrix"], res.params.T, atol=1e-8, rtol=0)
    np.testing.assert_allclose(est.offset, -est.matrix @ xs, rtol=1e-12)
    np.testing.assert_allclose(est.equilibrium, xs)
    assert est.equilibrium_known


def test_interest_inflation_has_no_real_logarithm():
    # statsmodels.datasets.interest_inflation: Dp (inflation change) and R (interest
    # rate), quarterly; its VAR(1) one-step matrix has a negative real eigenvalue
    data = sm.datasets.interest_inflation.load_pandas().data[["Dp", "R"]].to_numpy()
    res = VAR(data).fit(1, trend="c")  # reference: statsmodels VAR(1) with constant
    mu = np.linalg.eigvals(res.params[1:].T)
    assert np.any((np.abs(mu.imag) == 0) & (mu.real < 0))
    rec = make_recording(data, source="interest_inflation")
    with pytest.raises(NoRealLogarithmError) as info:
        DiscreteEstimator().fit(rec)
    msg = str(info.value)
    assert "\n" not in msg
    assert "no real logarithm" in msg and "trajectory" in msg and "interest_inflation" in msg
    # the batched map flags it instead of raising
    est = DiscreteEstimator()
    d = est.design(rec, values=rec.values[None])
    assert not est.fit_design(d).valid[0]


# -- noise-free recovery -----------------------------------------------------------------
@pytest.mark.parametrize("A", [NODE, SPIRAL, SADDLE, UNSTABLE_SPIRAL])
def test_noise_free_recovery(A):
    xs = np.array([1.5, -0.7])
    rec = simulate(A, xs, [3.0, 0.4], np.arange(60) * 0.25)
    est = DiscreteEstimator().fit(rec)
    np.testing.assert_allclose(est.matrix, A, atol=1e-8)
    np.testing.assert_allclose(est.equilibrium, xs, atol=1e-7)
    # one-step matrix is scipy.linalg.expm(A h)
    F_ref = scipy.linalg.expm(A * 0.25)
    np.testing.assert_allclose(est.extra["one_step_matrix"], F_ref, atol=1e-10)


def test_line_of_equilibria_offset():
    # det A = 0: every point of the line x1 = x2 + 1 is an equilibrium; b is still exact
    A = np.array([[-1.0, 1.0], [1.0, -1.0]]) * 0.3
    xs = np.array([1.0, 0.0])
    # two starts, so that the samples span the plane (one trajectory is a straight line)
    rec = simulate(A, xs, [[3.0, -1.0], [0.0, 3.0]], np.arange(40) * 0.5)
    est = DiscreteEstimator().fit(rec)
    np.testing.assert_allclose(est.matrix, A, atol=1e-9)
    np.testing.assert_allclose(est.offset, -A @ xs, atol=1e-9)
    assert est.equilibrium is None


def test_gaps_are_not_paired():
    xs = np.array([0.5, 0.2])
    t = np.concatenate([np.arange(30), np.arange(45, 80)]) * 0.2
    full = simulate(SPIRAL, xs, [2.0, 1.0], t)
    seg = (t > 6.0).astype(int)
    rec = make_recording(full.values, t, segment=seg, trajectory=np.zeros(t.size, int))
    est = DiscreteEstimator()
    d = est.design(rec)
    assert d.n_rows == t.size - 2
    e = est.fit(rec)
    np.testing.assert_allclose(e.matrix, SPIRAL, atol=1e-8)
    # pairing across the gap would see a 16-step jump and refuse the step jitter
    with pytest.raises(SamplingError):
        est.fit(make_recording(full.values, t))


def test_several_trajectories():
    xs = np.array([1.0, -1.0])
    x0 = np.array([[3.0, 0.0], [-1.0, 2.0], [0.0, -3.0]])
    rec = simulate(NODE, xs, x0, np.arange(25) * 0.5)
    est = DiscreteEstimator()
    assert est.design(rec).n_rows == rec.n_samples - 3
    e = est.fit(rec)
    np.testing.assert_allclose(e.matrix, NODE, atol=1e-8)
    np.testing.assert_allclose(e.equilibrium, xs, atol=1e-7)


def test_jitter_refused_with_alternatives():
    rng = np.random.default_rng(1)
    t = np.arange(50) + rng.uniform(-0.05, 0.05, 50)  # up to ~10 % step jitter
    rec = make_recording(rng.normal(size=(50, 2)), t, source="jittery.csv")
    with pytest.raises(SamplingError) as info:
        DiscreteEstimator().fit(rec)
    msg = str(info.value)
    for word in ("'integral'", "'derivative'", "'trajectory'", "jittery.csv", "row"):
        assert word in msg
    # within a looser tolerance the same data are accepted
    DiscreteEstimator(jitter_tolerance=0.5).design(rec)
    # 0.5 % jitter passes the default 1 % tolerance
    t2 = np.arange(50) + rng.uniform(-0.002, 0.002, 50)
    DiscreteEstimator().design(make_recording(rng.normal(size=(50, 2)), t2))


def test_settings_are_checked():
    with pytest.raises(EstimationError, match="no setting"):
        DiscreteEstimator(window=5)
    with pytest.raises(EstimationError, match="jitter_tolerance"):
        DiscreteEstimator(jitter_tolerance=-1)


def test_too_few_pairs_and_degenerate_data():
    with pytest.raises(TooFewSamplesError):
        DiscreteEstimator().fit(make_recording(np.ones((4, 2))))
    # samples on one straight line: the one-step regression is singular
    line = np.outer(0.9 ** np.arange(30), [1.0, 2.0])
    with pytest.raises(TooFewSamplesError, match="singular"):
        DiscreteEstimator().fit(make_recording(line))


def test_aliasing_warning():
    fast = np.array([[-0.05, 2.0], [-2.0, -0.05]])  # |Im lambda| = 2
    coarse = simulate(fast, [0, 0], [1.0, 0.0], np.arange(80) * 1.0)  # 2 rad per step
    e = DiscreteEstimator().fit(coarse)
    np.testing.assert_allclose(e.matrix, fast, atol=1e-8)
    assert any("aliasing" in w for w in e.warnings)
    fine = simulate(fast, [0, 0], [1.0, 0.0], np.arange(80) * 0.2)
    assert not DiscreteEstimator().fit(fine).warnings


def test_registry_and_batch_equals_loop():
    est = get_estimator("discrete")
    assert isinstance(est, DiscreteEstimator)
    batch = simulate(SPIRAL, [1, 1], [2, 0], np.arange(60) * 0.3, process_noise=0.02,
                     seed=4, replicates=6)  # fmt: skip
    rec = batch.recording(0)
    sb = est.fit_values(rec, batch.values)
    for i in range(6):
        e = est.fit(batch.recording(i))
        np.testing.assert_allclose(sb.matrix[i], e.matrix, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(sb.offset[i], e.offset, rtol=1e-10, atol=1e-12)


def test_parameter_covariance_against_monte_carlo():
    # the delta-method covariance of A should match the spread over repeated records
    A = SPIRAL
    batch = simulate(A, [0, 0], [1, 0], np.arange(800) * 0.2, process_noise=0.05,
                     seed=11, replicates=300)  # fmt: skip
    est = DiscreteEstimator()
    sb = est.fit_values(batch.recording(0), batch.values)
    mc = np.cov(np.concatenate([sb.matrix.reshape(-1, 4), sb.offset], axis=1), rowvar=False)
    pc = est.fit(batch.recording(0)).param_cov
    assert pc.shape == (6, 6)
    np.testing.assert_allclose(np.sqrt(np.diag(pc)), np.sqrt(np.diag(mc)), rtol=0.25)


def test_param_cov_jacobian_against_scipy_logm():
    # Jacobian of (F, g) -> A by scipy.linalg.logm finite differences (scipy reference)
    rec = simulate(SPIRAL, [1, 1], [2, 0], np.arange(200) * 0.3, process_noise=0.02, seed=2)
    est = DiscreteEstimator()
    e = est.fit(rec)
    F = e.extra["one_step_matrix"]
    h = e.extra["step"]
    J = np.empty((4, 4))
    eps = 1e-6
    for k in range(4):
        dF = np.zeros(4)
        dF[k] = eps
        up = scipy.linalg.logm(F + dF.reshape(2, 2)).real / h
        dn = scipy.linalg.logm(F - dF.reshape(2, 2)).real / h
        J[:, k] = ((up - dn) / (2 * eps)).ravel()
    cov_F = e.extra["one_step_covariance"][:4, :4]
    np.testing.assert_allclose(e.param_cov[:4, :4], J @ cov_F @ J.T, rtol=1e-5)


def test_bias_correction_never_forces_stability():
    def stable_of(theta):
        mu = np.abs(np.linalg.eigvals(theta[:, :4].reshape(-1, 2, 2))).max(axis=1)
        return np.ones(len(theta), bool), mu < 1

    hat = np.array([0.99, 0.0, 0.0, 0.5])
    # replicates centred below hat: the correction pushes F11 above 1 (unstable)
    star = hat + np.array([-0.03, 0, 0, 0]) + np.random.default_rng(0).normal(0, 1e-3, (50, 4))
    res = bias_correction(hat, star, stable_of)
    assert res.crossed and res.usable
    assert res.warning is not None and "stability boundary" in res.warning
    assert "left uncorrected" in res.warning
    assert res.theta[0] > 1  # the proposed correction, which the caller must not report
    # a correction that keeps the verdict is applied
    hat2 = np.array([0.8, 0.0, 0.0, 0.5])
    res2 = bias_correction(hat2, hat2 - 0.02 + 0 * star, stable_of)
    assert res2.warning is None and not res2.crossed
    np.testing.assert_allclose(res2.theta, hat2 + 0.02)
    np.testing.assert_allclose(res2.bias, -0.02)
    # replicates of a model other than the point estimate (an iteration)
    res3 = bias_correction(hat2, hat2 - 0.01 + 0 * star, stable_of, theta_model=hat2 + 0.02)
    np.testing.assert_allclose(res3.theta, hat2 + 0.03)


def test_log_map_branch_matches_linalg2():
    F = scipy.linalg.expm(SPIRAL * 0.4)
    L, ok = linalg2.logm(F)
    assert ok
    np.testing.assert_allclose(L / 0.4, SPIRAL, atol=1e-12)
