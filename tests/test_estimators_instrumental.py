"""Tests of the instrumental-variable one-step estimator.

External references, named beside each check:
- statsmodels' two-stage least squares (statsmodels.sandbox.regression.gmm.IV2SLS)
  on statsmodels' bundled dataset danish_data;
- the errors-in-variables attenuation of least squares (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.sandbox.regression.gmm import IV2SLS

from fitdyn.bootstrap import bootstrap
from fitdyn.errors import EstimationError, SamplingError, TooFewSamplesError
from fitdyn.estimators import get_estimator
from fitdyn.estimators.instrumental import InstrumentalEstimator, iv_solve
from fitdyn.simulate import simulate
from tests.test_estimators_discrete import make_recording

SPIRAL = np.array([[-0.3, 1.0], [-1.0, -0.3]])
X_STAR = np.array([1.0, 2.0])


def _mixed(n: int, seed: int, meas: float = 0.3, q: float = 0.3, h: float = 0.1):
    return simulate(
        SPIRAL, X_STAR, np.array([4.0, 0.0]), np.arange(n) * h,
        process_noise=np.diag([q, q]), measurement_noise=[meas, meas], seed=seed,
    )  # fmt: skip


@pytest.mark.parametrize("lags", [1, 2, 3])
def test_matches_statsmodels_iv2sls_on_danish_data(lags):
    # statsmodels.datasets.danish_data: log real money and log real income, quarterly
    data = sm.datasets.danish_data.load_pandas().data[["lrm", "lry"]].to_numpy()
    rec = make_recording(data, source="danish_data")
    est = InstrumentalEstimator(lags=lags)
    d = est.design(rec)
    C, c = est.solve(d)
    n = data.shape[0]
    k = np.arange(lags, n - 1)
    exog = np.column_stack([data[k], np.ones(k.size)])
    inst = np.column_stack([data[k - j] for j in range(1, lags + 1)] + [np.ones(k.size)])
    for i in range(2):
        # reference: statsmodels' IV2SLS, equation i of y_{k+1} = F y_k + g
        ref = IV2SLS(data[k + 1, i], exog, inst).fit().params
        np.testing.assert_allclose(C[0][:, i], ref[:2], rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(c[0, 0, i], ref[2], rtol=1e-8, atol=1e-10)


def test_consistent_where_least_squares_is_attenuated():
    # long record, process and measurement noise of similar size: least squares is
    # pulled toward zero (errors in variables; common practice, no source), the
    # instrumental fit is not
    rec = _mixed(20000, seed=3)
    iv = get_estimator("instrumental").fit(rec)
    ols = get_estimator("discrete").fit(rec)
    err_iv = np.linalg.norm(iv.matrix - SPIRAL) / np.linalg.norm(SPIRAL)
    err_ols = np.linalg.norm(ols.matrix - SPIRAL) / np.linalg.norm(SPIRAL)
    assert err_iv < 0.05
    assert err_ols > 0.3
    np.testing.assert_allclose(iv.equilibrium, X_STAR, atol=0.05)


def test_weights_equal_repeated_rows():
    rng = np.random.default_rng(0)
    Z = rng.normal(size=(40, 2))
    H = Z @ rng.normal(size=(2, 4)) + 0.3 * rng.normal(size=(40, 4))
    Y = Z @ np.array([[0.9, 0.1], [-0.2, 0.8]]) + 0.1 * rng.normal(size=(40, 2)) + 1.0
    w = rng.integers(0, 3, size=40).astype(float)
    C_w, c_w = iv_solve(Z, Y, H, True, w)
    rep = np.repeat(np.arange(40), w.astype(int))
    C_r, c_r = iv_solve(Z[rep], Y[rep], H[rep], True)
    np.testing.assert_allclose(C_w, C_r, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(c_w, c_r, rtol=1e-10, atol=1e-12)


def test_just_identified_equals_closed_form():
    # with as many instruments as regressors and no constant, 2SLS is (H'Z)^{-1} H'Y
    rng = np.random.default_rng(1)
    Z = rng.normal(size=(30, 2))
    H = Z + 0.5 * rng.normal(size=(30, 2))
    Y = rng.normal(size=(30, 2))
    C, _ = iv_solve(Z, Y, H, False)
    np.testing.assert_allclose(C[0], np.linalg.solve(H.T @ Z, H.T @ Y), rtol=1e-10)


def test_batch_equals_loop_and_known_equilibrium():
    rec = _mixed(300, seed=5)
    est = InstrumentalEstimator()
    vals = np.stack([_mixed(300, seed=s).values for s in (6, 7, 8)])
    batch = est.fit_values(rec, vals)
    for i, s in enumerate((6, 7, 8)):
        one = est.fit(_mixed(300, seed=s))
        np.testing.assert_allclose(batch.matrix[i], one.matrix, rtol=1e-10, atol=1e-12)
    known = est.fit(rec, equilibrium=X_STAR)
    assert known.equilibrium_known
    np.testing.assert_allclose(known.offset, -known.matrix @ X_STAR, rtol=1e-10)
    assert est.design(rec, X_STAR).groups is None


def test_rows_need_lags_within_a_segment():
    rec = _mixed(100, seed=2)
    seg = (np.arange(100) >= 50).astype(int)
    rec2 = make_recording(rec.values, rec.times, segment=seg)
    d = InstrumentalEstimator(lags=2).design(rec2)
    # 50 samples per segment: 50 - 1 pairs, less the first 2 of each for the lags
    assert d.n_rows == 2 * (49 - 2)
    first = d.info["first"]
    assert np.all(seg[first - 2] == seg[first + 1])


def test_settings_and_refusals():
    with pytest.raises(EstimationError, match="lags"):
        InstrumentalEstimator(lags=0)
    with pytest.raises(EstimationError, match="no setting"):
        get_estimator("instrumental", window=5)
    short = make_recording(np.random.default_rng(0).normal(size=(5, 2)))
    with pytest.raises(TooFewSamplesError, match="instrumental"):
        InstrumentalEstimator().fit(short)
    t = np.cumsum(np.random.default_rng(1).uniform(0.5, 1.5, 60))
    irregular = make_recording(np.random.default_rng(2).normal(size=(60, 2)), times=t)
    with pytest.raises(SamplingError):
        InstrumentalEstimator().fit(irregular)


def test_weak_instruments_warn():
    # white noise has no dynamics to carry earlier samples forward
    rng = np.random.default_rng(4)
    rec = make_recording(rng.normal(size=(400, 2)) + 5.0)
    try:
        e = InstrumentalEstimator().fit(rec)
    except EstimationError:  # no real logarithm is also a correct outcome
        return
    assert any("weak instruments" in w for w in e.warnings)


def test_bootstrap_schemes():
    rec = _mixed(300, seed=9)
    est = InstrumentalEstimator()
    e = est.fit(rec)
    # default: bias-corrected parametric bootstrap (the serially correlated one-step
    # errors rule out redrawing residuals independently)
    u1 = bootstrap(rec, est, e, replicates=200, seed=4, quiet=True)
    u2 = bootstrap(rec, est, e, replicates=200, seed=4, quiet=True)
    assert u1.scheme == "parametric"
    assert u1.bias_corrected
    assert u1.intervals["trace"] == u2.intervals["trace"]
    lo, hi = u1.intervals["trace"]
    assert lo < np.trace(SPIRAL) < hi
    ub = bootstrap(rec, est, e, replicates=200, seed=4, scheme="blocks", quiet=True)
    assert ub.intervals["trace"][0] < np.trace(SPIRAL) < ub.intervals["trace"][1]
    with pytest.raises(EstimationError, match="residual"):
        bootstrap(rec, est, e, replicates=50, seed=4, scheme="residual", quiet=True)


def test_coverage_small_simulation_with_both_noises():
    # 30 datasets with process and measurement noise, nominal 95 % intervals for the
    # trace: the default (instrumental fit, bias-corrected parametric bootstrap)
    # passes a loose bound that least squares on the samples, attenuated, fails
    trace = float(np.trace(SPIRAL))
    hits = {"instrumental": 0, "discrete": 0}
    for i in range(30):
        rec = _mixed(300, seed=100 + i, meas=0.15, q=0.1)
        for name in hits:
            est = get_estimator(name)
            try:
                e = est.fit(rec)
            except EstimationError:
                continue
            u = bootstrap(rec, est, e, replicates=150, seed=i, quiet=True)
            lo, hi = u.intervals["trace"]
            hits[name] += lo <= trace <= hi
    assert hits["instrumental"] >= 23  # 25 of 30 with these seeds
    assert hits["discrete"] <= 15  # 1 of 30
