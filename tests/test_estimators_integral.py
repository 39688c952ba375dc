"""Integral-form regression: running integrals, convergence, intercepts, covariance."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

import fitdyn
from fitdyn.errors import TooFewSamplesError
from fitdyn.estimators.derivative import segment_groups
from fitdyn.estimators.integral import IntegralEstimator, running_integral

A_SPIRAL = np.array([[-0.3, 1.2], [-1.0, -0.2]])
X_STAR = np.array([2.0, -1.0])


def spiral_rec(n=150, noise=0.0, seed=0, span=12.0, x0s=((4.0, 1.0), (0.0, -3.0))):
    return fitdyn.simulate(
        A_SPIRAL,
        X_STAR,
        np.array(x0s),
        np.linspace(0, span, n),
        measurement_noise=None if noise == 0 else noise,
        seed=seed,
    )


def split_segments(rec, at):
    """Start a new segment at each sample index in ``at`` (a gap there)."""
    seg = rec.segment.copy()
    for i in at:
        seg[i:] += 1
    return replace(rec, segment=seg)


def test_running_integral_matches_scipy_cumulative_trapezoid():
    # reference: scipy.integrate.cumulative_trapezoid applied segment by segment
    from scipy.integrate import cumulative_trapezoid

    rng = np.random.default_rng(0)
    t = np.concatenate([np.sort(rng.uniform(0, 5, 30)), np.sort(rng.uniform(0, 3, 20))])
    groups = np.r_[np.zeros(12, int), np.ones(18, int), np.full(20, 2)]
    V = rng.normal(size=(4, 50, 2))
    got = running_integral(t, V, groups)
    for g in range(3):
        m = groups == g
        ref = cumulative_trapezoid(V[:, m], t[m], axis=1, initial=0)
        assert np.allclose(got[:, m], ref, rtol=1e-12, atol=1e-12)


def test_trapezoid_error_is_second_order():
    errs = []
    for n in (201, 401):
        est = IntegralEstimator().fit(spiral_rec(n))
        errs.append(np.max(np.abs(est.matrix - A_SPIRAL)))
    assert 3.5 < errs[0] / errs[1] < 4.5


def test_intercepts_are_segment_starting_states():
    rec = split_segments(spiral_rec(2001), [700])
    est = IntegralEstimator().fit(rec)
    _, bounds = segment_groups(rec)
    starts = rec.values[[a for a, _ in bounds]]
    assert est.extra["segment_initial_states"].shape == (3, 2)
    assert np.allclose(est.extra["segment_initial_states"], starts, atol=1e-4)


def test_parameter_covariance_matches_statsmodels_ols_with_segment_dummies():
    # reference: statsmodels OLS of each channel on the integrals, elapsed time and one
    # dummy per segment; by Frisch-Waugh-Lovell the slope covariance is ours
    import statsmodels.api as sm

    rec = spiral_rec(120, noise=0.05, seed=1)
    estimator = IntegralEstimator()
    est = estimator.fit(rec)
    d = estimator.design(rec)
    dummies = np.eye(d.n_groups)[d.groups]
    X = np.column_stack([d.Z, dummies])
    for k, idx in enumerate(([0, 1, 4], [2, 3, 5])):
        res = sm.OLS(d.Y[:, k], X).fit()
        assert np.allclose(res.params[:2], est.matrix[k], rtol=1e-8)
        assert np.isclose(res.params[2], est.offset[k], rtol=1e-8)
        assert np.allclose(est.param_cov[np.ix_(idx, idx)], res.cov_params()[:3, :3], rtol=1e-7)


def test_known_equilibrium_drops_the_offset_column():
    rec = spiral_rec(120, noise=0.05, seed=2)
    d = IntegralEstimator().design(rec, X_STAR)
    assert d.Z.shape == (rec.n_samples, 2)
    est = IntegralEstimator().fit(rec, X_STAR)
    assert np.allclose(est.offset, -est.matrix @ X_STAR)
    # b = -A x* exactly, so the delta-method covariance of b is J cov(A) J'
    J = -np.kron(np.eye(2), X_STAR[None, :])
    assert np.allclose(est.param_cov[4:, 4:], J @ est.param_cov[:4, :4] @ J.T)


def test_measurement_noise_at_segment_start_is_absorbed():
    """A gross error in each segment's first sample changes only that segment's
    intercept row, far less than differencing against the first sample would."""
    rec = spiral_rec(150, noise=0.02, seed=3)
    bad = rec.values.copy()
    firsts = np.r_[0, np.flatnonzero(np.diff(rec.segment)) + 1]
    bad[firsts] += np.array([3.0, -3.0])
    est = IntegralEstimator().fit(rec.with_values(bad))
    assert np.max(np.abs(est.matrix - A_SPIRAL)) < 0.05


def test_notes_warn_about_correlated_rows():
    est = IntegralEstimator().fit(spiral_rec(100, noise=0.02))
    assert any("blocks" in n for n in est.notes)


def test_too_few_samples():
    rec = spiral_rec(150).select(np.r_[[True] * 2, [False] * 148, [True] * 2, [False] * 148])
    with pytest.raises(TooFewSamplesError, match="too few"):
        IntegralEstimator().fit(rec)
