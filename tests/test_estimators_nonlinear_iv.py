"""Tests of the nonlinear instrumental-variable one-step estimator.

External references, named beside each check:
- statsmodels' two-stage least squares (statsmodels.sandbox.regression.gmm.IV2SLS)
  with scipy.linalg.logm for the uniform-step case, where the moment equations are
  the two-stage least-squares equations of ``y_{k+1} = F y_k + g``;
- scipy.linalg.expm for the exact noise-free solutions;
- the errors-in-variables attenuation of least squares (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm, logm
from statsmodels.sandbox.regression.gmm import IV2SLS

from fitdyn.bootstrap import bootstrap
from fitdyn.errors import EstimationError, TooFewSamplesError
from fitdyn.estimators import get_estimator
from fitdyn.estimators.nonlinear_iv import NonlinearIVEstimator, instrumented_pairs
from fitdyn.simulate import simulate
from tests.test_estimators_discrete import make_recording

SPIRAL = np.array([[-0.3, 1.0], [-1.0, -0.3]])
X_STAR = np.array([1.0, 2.0])


def _irregular_mixed(n: int, seed: int, meas: float = 0.3, q: float = 0.3, span: float = 60.0):
    rng = np.random.default_rng(seed)
    t = np.sort(rng.uniform(0.0, span, n))
    t[0] = 0.0
    return simulate(
        SPIRAL, X_STAR, np.array([4.0, 0.0]), t,
        process_noise=np.diag([q, q]), measurement_noise=[meas, meas], seed=rng,
    )  # fmt: skip


def test_uniform_steps_match_statsmodels_iv2sls_and_logm():
    # On a uniform step the moment equations are those of two-stage least squares of
    # y_{k+1} = F y_k + g with instruments (y_{k-1}, 1); A = logm(F) / h and
    # x* = (I - F)^{-1} g.  Reference: statsmodels' IV2SLS and scipy.linalg.logm.
    h = 0.1
    rec = simulate(
        SPIRAL, X_STAR, np.array([4.0, 0.0]), np.arange(400) * h,
        process_noise=np.diag([0.3, 0.3]), measurement_noise=[0.2, 0.2], seed=11,
    )  # fmt: skip
    y = rec.values
    k = np.arange(1, y.shape[0] - 1)
    exog = np.column_stack([y[k], np.ones(k.size)])
    inst = np.column_stack([y[k - 1], np.ones(k.size)])
    F = np.empty((2, 2))
    g = np.empty(2)
    for i in range(2):
        p = IV2SLS(y[k + 1, i], exog, inst).fit().params
        F[i] = p[:2]
        g[i] = p[2]
    A_ref = np.real(logm(F)) / h
    xs_ref = np.linalg.solve(np.eye(2) - F, g)
    e = NonlinearIVEstimator().fit(rec)
    assert e.extra["solved"]
    np.testing.assert_allclose(e.matrix, A_ref, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(e.equilibrium, xs_ref, rtol=1e-7, atol=1e-9)
    # and the uniform-step instrumental estimator gives the same system
    iv = get_estimator("instrumental").fit(rec)
    np.testing.assert_allclose(e.matrix, iv.matrix, rtol=1e-7, atol=1e-9)


def test_moment_equations_hold_at_the_estimate():
    rec = _irregular_mixed(300, seed=2)
    e = NonlinearIVEstimator().fit(rec)
    first, h = instrumented_pairs(rec, "nonlinear-iv")
    y = rec.values
    r = (
        y[first + 1]
        - e.equilibrium
        - np.einsum("kij,kj->ki", expm(e.matrix[None] * h[:, None, None]), y[first] - e.equilibrium)
    )
    z = np.column_stack([y[first - 1] - y[first - 1].mean(axis=0), np.ones(first.size)])
    m = z.T @ r / first.size
    size = np.abs(z).T @ np.abs(r) / first.size
    assert np.max(np.abs(m) / size) < 1e-7
    assert e.extra["solved"]


def test_noise_free_irregular_recovery():
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 15, 120))
    dev = expm(SPIRAL[None] * t[:, None, None]) @ (np.array([4.0, 0.0]) - X_STAR)
    rec = make_recording(X_STAR + dev, times=t)
    e = NonlinearIVEstimator().fit(rec)
    np.testing.assert_allclose(e.matrix, SPIRAL, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(e.equilibrium, X_STAR, rtol=1e-7, atol=1e-8)


def test_consistent_on_irregular_steps_where_prediction_error_is_attenuated():
    # both noises, irregular steps, a long record: the prediction-error (least
    # squares) fit is pulled toward zero by the sensor noise in its regressor
    # (errors in variables; common practice, no source), the instrumental fit is not
    rec = _irregular_mixed(20000, seed=5, span=2000.0)
    iv = get_estimator("nonlinear-iv").fit(rec)
    pe = get_estimator("prediction").fit(rec)
    err_iv = np.linalg.norm(iv.matrix - SPIRAL) / np.linalg.norm(SPIRAL)
    err_pe = np.linalg.norm(pe.matrix - SPIRAL) / np.linalg.norm(SPIRAL)
    assert err_iv < 0.05
    assert err_pe > 3 * err_iv
    np.testing.assert_allclose(iv.equilibrium, X_STAR, atol=0.05)


@pytest.mark.parametrize("noise", ["likelihood", "moments"])
def test_noise_near_the_truth(noise):
    rec = _irregular_mixed(6000, seed=6, span=600.0, meas=0.3, q=0.3)
    e = get_estimator("nonlinear-iv", noise=noise).fit(rec)
    assert any(f"noise by {'maximum likelihood' if noise == 'likelihood' else 'moments'}" in n
               for n in e.notes)  # fmt: skip
    np.testing.assert_allclose(e.extra["measurement_cov"], np.diag([0.09, 0.09]), atol=0.02)
    # the process noise is the hard part when the sensor noise dominates a step: the
    # likelihood pins it down better than the moments (loose bounds for one record)
    tol = 0.06 if noise == "likelihood" else 0.15
    np.testing.assert_allclose(e.extra["process_noise"], np.diag([0.3, 0.3]), atol=tol)


def test_sandwich_covariance_matches_the_spread_of_estimates():
    # the method-of-moments covariance against the spread over 40 simulated records
    # of the same design (a loose factor: 40 records estimate an sd to about 11 %)
    est = NonlinearIVEstimator(noise="moments")  # the noise plays no part here
    mats, sds = [], []
    for s in range(40):
        e = est.fit(_irregular_mixed(600, seed=100 + s))
        mats.append(e.matrix.ravel())
        sds.append(np.sqrt(np.diag(e.param_cov)[:4]))
    spread = np.std(mats, axis=0, ddof=1)
    ratio = np.median(sds, axis=0) / spread
    assert np.all((ratio > 0.6) & (ratio < 1.6)), ratio


def test_known_equilibrium_and_batch():
    rec = _irregular_mixed(300, seed=7)
    est = NonlinearIVEstimator()
    known = est.fit(rec, equilibrium=X_STAR)
    assert known.equilibrium_known
    np.testing.assert_allclose(known.offset, -known.matrix @ X_STAR, rtol=1e-10)
    est.fit(rec)
    vals = np.stack([rec.values + 0.05 * np.random.default_rng(s).standard_normal(rec.values.shape)
                     for s in (1, 2)])  # fmt: skip
    batch = est.fit_values(rec, vals)
    for i in range(2):
        one = NonlinearIVEstimator().fit(rec.with_values(vals[i]))
        np.testing.assert_allclose(batch.matrix[i], one.matrix, rtol=1e-8, atol=1e-10)


def test_pairs_need_the_sample_before_within_a_segment():
    rec = _irregular_mixed(100, seed=8)
    seg = (np.arange(100) >= 50).astype(int)
    rec2 = make_recording(rec.values, rec.times, segment=seg)
    first, h = instrumented_pairs(rec2, "nonlinear-iv")
    assert first.size == 2 * 48
    assert np.all(seg[first - 1] == seg[first + 1])
    np.testing.assert_allclose(h, rec.times[first + 1] - rec.times[first])


def test_settings_and_refusals():
    with pytest.raises(EstimationError, match="no setting"):
        get_estimator("nonlinear-iv", lags=2)
    short = make_recording(np.random.default_rng(0).normal(size=(6, 2)))
    with pytest.raises(TooFewSamplesError, match="nonlinear-iv"):
        NonlinearIVEstimator().fit(short)


def test_bootstrap_default_is_bias_corrected_parametric_with_its_noise():
    rec = _irregular_mixed(300, seed=9)
    est = NonlinearIVEstimator()
    e = est.fit(rec)
    u1 = bootstrap(rec, est, e, replicates=100, seed=4, quiet=True)
    u2 = bootstrap(rec, est, e, replicates=100, seed=4, quiet=True)
    assert u1.scheme == "parametric"
    assert u1.bias_corrected
    assert u1.intervals["trace"] == u2.intervals["trace"]
    assert any("measurement noise R" in n for n in u1.notes)
    lo, hi = u1.intervals["trace"]
    assert lo < np.trace(SPIRAL) < hi


def test_coverage_small_simulation_irregular_with_both_noises():
    # 24 irregular records with process and sensor noise, nominal 95 % intervals for
    # the trace: the default bootstrap of the instrumental fit passes a loose bound
    # that the prediction-error fit, attenuated by the sensor noise, fails
    trace = float(np.trace(SPIRAL))
    hits = {"nonlinear-iv": 0, "prediction": 0}
    for i in range(20):
        rec = _irregular_mixed(250, seed=200 + i, meas=0.3, q=0.2)
        for name in hits:
            est = get_estimator(name)
            e = est.fit(rec)
            u = bootstrap(rec, est, e, replicates=80, seed=i, quiet=True,
                          bias_correction=None if name == "nonlinear-iv" else False)  # fmt: skip
            lo, hi = u.intervals["trace"]
            hits[name] += lo <= trace <= hi
    assert hits["nonlinear-iv"] >= 16, hits
    assert hits["prediction"] <= 10, hits


def test_asymptotic_agrees_with_bootstrap_on_a_long_record():
    from fitdyn.asymptotic import asymptotic

    rec = _irregular_mixed(3000, seed=12, span=300.0, meas=0.2, q=0.3)
    est = NonlinearIVEstimator()
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=200, seed=3, bias_correction=False, quiet=True)
    a = asymptotic(rec, est, e, seed=1)
    for name in ("trace", "determinant", "max_real_part"):
        lo_b, hi_b = u.intervals[name]
        lo_a, hi_a = a.intervals[name]
        width = hi_b - lo_b
        assert abs(lo_a - lo_b) < 0.2 * width and abs(hi_a - hi_b) < 0.2 * width, name


def _moment_residual(rec, A, xs):
    """max |moment| / size of its terms, with scipy.linalg.expm for every step."""
    first, h = instrumented_pairs(rec, "nonlinear-iv")
    y = rec.values
    F = expm(A[None] * h[:, None, None])
    r = y[first + 1] - xs - np.einsum("kij,kj->ki", F, y[first] - xs)
    z = np.column_stack([y[first - 1] - y[first - 1].mean(axis=0), np.ones(first.size)])
    return float(np.max(np.abs(z.T @ r) / (np.abs(z).T @ np.abs(r))))


def test_nearly_singular_system_refits_solve_their_equations_without_failures():
    # A slow mode (eigenvalues about -1.1 and -0.001): the equilibrium is barely
    # determined and, with x* as a free parameter, the solver used to crawl along
    # the flat valley to its iteration cap (6 of these 40 replicates failed).  With
    # x* eliminated every refit must solve its own moment equations (checked with
    # scipy.linalg.expm on every step).
    A = np.array([[-1.0, 0.5], [0.198, -0.1]])
    rng = np.random.default_rng(21)
    t = np.sort(rng.uniform(0.0, 30.0, 200))
    t[0] = 0.0
    rec = simulate(A, X_STAR, np.array([4.0, 1.0]), t, process_noise=np.diag([0.05, 0.05]),
                   measurement_noise=[0.1, 0.1], seed=rng)  # fmt: skip
    est = NonlinearIVEstimator(noise="moments")
    e = est.fit(rec)
    assert _moment_residual(rec, e.matrix, e.equilibrium) < 1e-7
    reps = simulate(e.matrix, e.equilibrium, rec.values[0], t,
                    process_noise=e.extra["process_noise"], measurement_noise=[0.1, 0.1],
                    replicates=40, seed=22)  # fmt: skip
    V = reps.values  # (40, n, 2)
    batch = est.fit_values(rec, V)
    assert batch.valid.all(), est.last_failures
    dets = np.linalg.det(batch.matrix)
    assert np.min(np.abs(dets)) < 0.01 * np.median(np.abs(dets))  # some nearly singular
    for k in range(V.shape[0]):
        xs = np.linalg.solve(batch.matrix[k], -batch.offset[k])
        assert _moment_residual(rec.with_values(V[k]), batch.matrix[k], xs) < 1e-6


def test_time_budget_spent_fails_replicates_and_is_checked():
    from fitdyn.estimators.lm import STATUS

    with pytest.raises(EstimationError, match="time_budget"):
        NonlinearIVEstimator(time_budget=-2)
    rec = _irregular_mixed(120, seed=3)
    est = NonlinearIVEstimator(noise="moments", time_budget=1e-9)
    e = est.fit(rec)
    assert any("time budget" in w for w in e.warnings)
    V = rec.values[None] + 0.05 * np.random.default_rng(1).standard_normal((4, rec.n_samples, 2))
    s = est.fit_values(rec, V)
    assert not s.valid.any()
    assert est.last_failures["reasons"] == {STATUS[2]: 4}
