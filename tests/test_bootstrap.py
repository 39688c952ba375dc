"""Tests of the resampling schemes, the summaries and the asymptotic alternative.

External references, named beside each check: numpy.linalg.lstsq (weighted rows
as repeated rows), scipy.stats.norm (normal quantiles); the rules of the trade on
the trace-determinant plane are marked "common practice, no source".
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
import scipy.stats

from fitdyn import linalg2
from fitdyn.asymptotic import asymptotic
from fitdyn.bootstrap import (
    Uncertainty,
    _block_weights,
    _gaussian_innovations,
    _Plan,
    _Runner,
    _split_theta,
    block_length,
    bootstrap,
    choose_scheme,
    consistent_classes,
    margin_codes,
    noise_model,
    summarize,
)
from fitdyn.classify import GENERIC, LABELS
from fitdyn.errors import EstimationError
from fitdyn.estimators import get_estimator
from fitdyn.estimators.discrete import DiscreteEstimator
from fitdyn.simulate import simulate

SPIRAL = np.array([[-0.3, 1.0], [-1.0, -0.2]])
NODE = np.array([[-0.35, 0.30], [0.15, -0.20]])


def _spiral_record(n=200, seed=0, q=0.02, h=0.1):
    return simulate(SPIRAL, [1.0, 2.0], [3.0, 0.0], np.arange(n) * h, process_noise=q, seed=seed)


# -- reproducibility and layout ---------------------------------------------------------
def test_same_seed_same_numbers_different_seed_differs():
    rec = _spiral_record()
    est = DiscreteEstimator()
    e = est.fit(rec)
    u1 = bootstrap(rec, est, e, replicates=150, seed=42, quiet=True)
    u2 = bootstrap(rec, est, e, replicates=150, seed=42, quiet=True)
    u3 = bootstrap(rec, est, e, replicates=150, seed=43, quiet=True)
    np.testing.assert_array_equal(u1.matrices, u2.matrices)
    assert u1.to_dict() == u2.to_dict()
    assert not np.array_equal(u1.matrices, u3.matrices)
    assert u1.seed == 42 and u1.replicates == 150 and u1.scheme == "residual"


def test_json_layout():
    rec = _spiral_record()
    est = DiscreteEstimator()
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=100, seed=1, margin=0.01, quiet=True)
    d = u.to_dict()
    text = json.dumps(d, allow_nan=False)  # strict JSON: no NaN or infinity
    assert json.loads(text) == d
    for key in ("replicates", "scheme", "confidence", "intervals", "class_probabilities",
                "p_stable", "consistent_with", "failed_replicates"):  # fmt: skip
        assert key in d
    iv = d["intervals"]
    for key in ("trace", "determinant", "discriminant", "max_real_part"):
        assert len(iv[key]) == 2 and iv[key][0] <= iv[key][1]
    assert np.shape(iv["eigenvalue_real"]) == (2, 2)
    assert np.shape(iv["eigenvalue_imag"]) == (2, 2)
    assert np.shape(iv["matrix"]) == (2, 2, 2)
    assert np.shape(iv["equilibrium"]) == (2, 2)
    assert np.shape(iv["time_constants"]) == (2, 2)
    assert len(iv["period"]) == 2 and len(iv["damping_ratio"]) == 2
    assert set(GENERIC) <= set(d["class_probabilities"])
    assert abs(sum(d["class_probabilities"].values()) - 1) < 1e-12
    assert abs(sum(d["margin_probabilities"].values()) - 1) < 1e-12
    assert d["confidence"] == 0.95 and d["replicates"] == 100
    text = "\n".join(u.summary_lines())
    assert "lambda1 =" in text and "stable with P =" in text


def test_scheme_defaults():
    rec = _spiral_record()
    assert choose_scheme(get_estimator("discrete"), rec)[0] == "residual"
    assert choose_scheme(get_estimator("integral"), rec)[0] == "blocks"
    assert choose_scheme(get_estimator("derivative"), rec)[0] == "blocks"
    assert choose_scheme(get_estimator("trajectory"), rec)[0] == "parametric"


def test_bad_arguments():
    rec = _spiral_record(n=60)
    est = DiscreteEstimator()
    e = est.fit(rec)
    with pytest.raises(EstimationError, match="scheme"):
        bootstrap(rec, est, e, replicates=10, scheme="rows")
    with pytest.raises(EstimationError, match="at least 5|at least five|needs at least"):
        bootstrap(rec, est, e, replicates=10, scheme="cases")
    with pytest.raises(EstimationError, match="confidence"):
        bootstrap(rec, est, e, replicates=10, confidence=1.5, quiet=True)


# -- consistent_with, margins and probabilities on constructed clouds ---------------------
def _cloud(center, sd, n=2000, seed=0, entries=(0, 1, 2, 3)):
    rng = np.random.default_rng(seed)
    A = np.broadcast_to(np.asarray(center, float), (n, 2, 2)).copy().reshape(n, 4)
    for k in entries:
        A[:, k] += rng.normal(0, sd, n)
    return A.reshape(n, 2, 2)


def _summ(A, **kw):
    n = A.shape[0]
    return summarize(A, np.zeros((n, 2)), np.ones(n, bool), A.mean(axis=0), np.zeros(2), **kw)


def test_cloud_straddling_zero_trace_is_consistent_with_center():
    # trace = 2 t with t ~ N(0, 0.02): the trace interval contains 0, det ~ 1 > 0
    rng = np.random.default_rng(1)
    t = rng.normal(0, 0.02, 2000)
    A = np.stack([np.stack([t, np.ones_like(t)], -1), np.stack([-np.ones_like(t), t], -1)], -2)
    u = _summ(A)
    assert "center" in u.consistent_with
    assert "non-isolated equilibria" not in u.consistent_with
    # the real part may be 0: time constants are unbounded above (null in JSON)
    assert u.intervals["time_constants"][0][1] == np.inf
    d = u.to_dict()
    assert d["intervals"]["time_constants"][0][1] is None
    json.dumps(d, allow_nan=False)
    # rule of the trade (common practice, no source): det > 0, disc < 0 -> spirals,
    # the sign of the trace decides stability
    p = u.class_probabilities
    assert abs(p["stable spiral"] + p["unstable spiral"] - 1) < 1e-12
    assert 0.4 < p["stable spiral"] < 0.6
    assert abs(u.p_stable - p["stable spiral"]) < 1e-12
    # with a margin of 1 % per cycle, part of the cloud counts as a center
    m = _summ(A, margin=0.01).margin_probabilities
    assert 0.05 < m["center"] < 0.5
    assert abs(sum(m.values()) - 1) < 1e-12


def test_far_from_boundaries_nothing_consistent():
    u = _summ(_cloud(SPIRAL, 0.01))
    assert u.consistent_with == []
    assert u.class_probabilities["stable spiral"] == 1.0
    assert u.p_stable == 1.0


def test_star_and_degenerate_node():
    # A = -I + noise on all entries: repeated eigenvalues and A - (tau/2) I ~ 0
    u = _summ(_cloud(-np.eye(2), 0.02))
    assert "stable star" in u.consistent_with
    assert "stable degenerate node" in u.consistent_with
    assert "unstable star" not in u.consistent_with
    # a Jordan block: repeated eigenvalues, but A - (tau/2) I = [[0, 1], [0, 0]] != 0
    u2 = _summ(_cloud([[-1.0, 1.0], [0.0, -1.0]], 0.02))
    assert "stable degenerate node" in u2.consistent_with
    assert "stable star" not in u2.consistent_with
    # a perturbation eps of a Jordan block splits the eigenvalues by about sqrt(eps)
    m = _summ(_cloud([[-1.0, 1.0], [0.0, -1.0]], 1e-5), margin=0.05).margin_probabilities
    assert m["stable degenerate node"] > 0.9


def test_determinant_straddling_zero_is_non_isolated():
    # diag(-1, eps), eps ~ N(0, 0.01): one eigenvalue near 0
    u = _summ(_cloud(np.diag([-1.0, 0.0]), 0.01, entries=(3,)))
    assert "non-isolated equilibria" in u.consistent_with
    # rule of the trade (common practice, no source): det < 0 -> saddle
    assert 0.3 < u.class_probabilities["saddle"] < 0.7
    m = _summ(_cloud(np.diag([-1.0, 0.0]), 0.001, entries=(3,)), margin=0.01)
    assert m.margin_probabilities["non-isolated equilibria"] > 0.9


def test_consistent_classes_direct_rules():
    dev = np.random.default_rng(0).normal(5.0, 0.1, (100, 3))
    iv = {"trace": (-0.1, 0.2), "determinant": (0.5, 1.0), "discriminant": (-4.0, -2.0)}
    assert consistent_classes(iv, dev, 0.95) == ["center"]
    iv = {"trace": (-0.3, -0.2), "determinant": (-0.1, 0.1), "discriminant": (-0.2, 0.3)}
    assert consistent_classes(iv, dev, 0.95) == ["stable degenerate node",
                                                 "non-isolated equilibria"]  # fmt: skip


def test_margin_codes_examples():
    # decay per cycle exp(2 pi Re / Im) - 1: Re = -0.001, Im = 1 -> 0.6 % per cycle
    A = np.array([[[-0.001, 1.0], [-1.0, -0.001]], [[-0.1, 1.0], [-1.0, -0.1]]])
    codes = margin_codes(A, 0.01)
    assert LABELS[codes[0]] == "center"
    assert LABELS[codes[1]] == "stable spiral"


def test_failed_replicates_are_counted():
    A = _cloud(SPIRAL, 0.01, n=100)
    valid = np.ones(100, bool)
    valid[:7] = False
    u = summarize(
        A, np.zeros((100, 2)), valid, SPIRAL, np.zeros(2), failure_label="no real logarithm"
    )
    assert u.failed_replicates == 7
    assert u.class_probabilities["no real logarithm"] == pytest.approx(0.07)
    assert u.p_stable == pytest.approx(0.93) and u.p_stable_upper == pytest.approx(1.0)
    assert abs(sum(u.class_probabilities.values()) - 1) < 1e-12
    assert u.valid.sum() == 93 and np.all(np.isnan(u.matrices[:7]))


def test_failed_replicates_in_a_real_bootstrap():
    # a fast node sampled coarsely: exp(lambda h) is near 0, so noisy replicates of F
    # often get a negative eigenvalue (no real logarithm); they are counted, not redrawn
    A = np.diag([-0.3, -2.5])
    rec = simulate(A, [0, 0], [2.0, 2.0], np.arange(80) * 1.2, process_noise=0.5, seed=3)
    est = DiscreteEstimator()
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=300, seed=0, bias_correction=False, quiet=True)
    assert u.valid.size == 300
    assert u.failed_replicates > 0
    assert u.failed_replicates == int((~u.valid).sum())
    assert u.class_probabilities["no real logarithm"] == pytest.approx(u.failed_replicates / 300)
    assert any("failed" in w for w in u.warnings)


# -- batch = loop ---------------------------------------------------------------------------
def _given_innovations(E):
    """``fill`` for _Recursion.moments that reads innovations E (m, B, 2) by design row."""

    def fill(rows, shift, out):
        out[:] = np.moveaxis(E[rows] + shift, -1, 0)

    return fill


def _regenerate_by_loop(rec, gen, F, g, E, eq=None):
    """Replicate series (B, n, 2) by a Python loop over replicates, segments and steps."""
    off = np.zeros(2) if eq is None else np.asarray(eq, float)
    out = np.empty((E.shape[1],) + rec.values.shape)
    for i in range(E.shape[1]):
        x = rec.values - off
        for s, t in rec.segment_bounds():
            for k in range(s, t - 1):
                x[k + 1] = F @ x[k] + g + E[gen.row_of[k], i]
        out[i] = x + off
    return out


def _model(plan):
    C, c = _split_theta(plan.theta_hat[None], plan.p, plan.G)
    return C[0].T, (c[0, 0] if plan.G else np.zeros(2))


def test_residual_batch_equals_loop():
    rec = _spiral_record(n=120, seed=5)
    est = DiscreteEstimator()
    e = est.fit(rec)
    plan = _Plan(rec, est, e)
    runner = _Runner(plan, "residual", None, [])
    rng = np.random.default_rng(0)
    gen = runner.rec_gen
    F = e.extra["one_step_matrix"]
    g = e.extra["one_step_constant"]
    resid = gen.residuals(F, g, 3)
    E = resid[rng.integers(0, gen.m, size=(gen.m, 8))]
    sysb = plan.systems(plan.refit_moments(gen.moments(F, g, 8, _given_innovations(E))))
    # the recursion replicate by replicate, then the point fit of each replicate series
    values = _regenerate_by_loop(rec, gen, F, g, E)
    for i in range(8):
        one = est.fit(rec.with_values(values[i]))
        np.testing.assert_allclose(sysb.matrix[i], one.matrix, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(sysb.offset[i], one.offset, rtol=1e-9, atol=1e-12)


def _gappy_record():
    # three trajectories of different lengths; gaps split the first and the third,
    # leaving a lone sample (a segment with no pair)
    times = [np.arange(40) * 0.1, np.arange(25) * 0.1, np.arange(31) * 0.1]
    rec = simulate(SPIRAL, [1.0, 2.0], [[3.0, 0.0], [0.0, -2.0], [1.0, 1.0]], times,
                   process_noise=0.02, seed=3)  # fmt: skip
    new = np.diff(rec.trajectory) != 0
    new |= np.isin(np.arange(1, rec.n_samples), [17, 70, 71])
    return replace(rec, segment=np.concatenate([[0], np.cumsum(new)]))


@pytest.mark.parametrize("known", [False, True])
@pytest.mark.parametrize("block_states", [1, 50, None])
def test_moment_path_equals_materialised_path(known, block_states, monkeypatch):
    import fitdyn.bootstrap as bs

    if block_states is not None:  # time blocks of one or a few steps
        monkeypatch.setattr(bs, "_BLOCK_STATES", block_states)
    rec = _gappy_record()
    assert [t - s for s, t in rec.segment_bounds()] == [17, 23, 25, 5, 1, 25]
    eq = np.array([1.0, 2.0]) if known else None
    est = DiscreteEstimator()
    plan = _Plan(rec, est, est.fit(rec, eq))
    gen = _Runner(plan, "residual", None, []).rec_gen
    assert gen.m == rec.n_samples - 6
    F, g = _model(plan)
    rng = np.random.default_rng(4)
    E = gen.residuals(F, g, 3)[rng.integers(0, gen.m, size=(gen.m, 6))]
    moment = plan.refit_moments(gen.moments(F, g, 6, _given_innovations(E)))
    # the materialised path: replicate series, then the batched design and lstsq
    materialised = plan.refit_values(_regenerate_by_loop(rec, gen, F, g, E, eq))
    assert moment.shape == materialised.shape == (6, 4 if known else 6)
    np.testing.assert_allclose(moment, materialised, rtol=1e-11, atol=1e-13)
    # and the one-replicate case: the observed innovations give back the point fit
    E0 = (rec.values[gen.first + 1] - (0 if eq is None else eq)) - (
        (rec.values[gen.first] - (0 if eq is None else eq)) @ F.T + g
    )
    point = plan.refit_moments(gen.moments(F, g, 1, _given_innovations(E0[:, None, :])))
    np.testing.assert_allclose(point[0], plan.theta_hat, rtol=1e-10, atol=1e-13)


def test_known_equilibrium_and_chunks_in_a_real_bootstrap():
    rec = _gappy_record()
    eq = np.array([1.0, 2.0])
    est = DiscreteEstimator()
    e = est.fit(rec, eq)
    kw = dict(replicates=150, seed=9, bias_correction=False, quiet=True)
    u = bootstrap(rec, est, e, chunk=64, **kw)  # chunks of 64, 64 and 22
    assert u.valid.sum() > 140
    # a known equilibrium is kept in every replicate: b* = -A* x*
    ok = u.valid
    np.testing.assert_allclose(u.equilibria[ok], np.broadcast_to(eq, (ok.sum(), 2)), atol=1e-9)
    np.testing.assert_array_equal(u.matrices, bootstrap(rec, est, e, chunk=64, **kw).matrices)
    # another chunking draws other numbers but describes the same distribution
    w = bootstrap(rec, est, e, **kw)
    for name in ("trace", "determinant"):
        (a, b), (c, d) = u.intervals[name], w.intervals[name]
        assert abs(a - c) < 0.35 * (b - a) and abs(b - d) < 0.35 * (b - a)


def test_parametric_discrete_has_gaussian_innovations_of_the_residual_covariance():
    rec = _spiral_record(n=400, seed=8, q=0.05)
    est = DiscreteEstimator()
    e = est.fit(rec)
    root = np.linalg.cholesky(e.residual_cov)
    fill = _gaussian_innovations(np.random.default_rng(0), root)
    out = np.empty((2, 500, 1, 200))
    shift = np.array([0.3, -0.1])
    fill(np.zeros((500, 1), int), shift, out)
    z = out.reshape(2, -1).T
    sd = np.sqrt(np.diag(e.residual_cov) / z.shape[0])
    np.testing.assert_allclose(z.mean(axis=0), shift, atol=float(4 * sd.max()))
    # sampling sd of a covariance entry is at most about var * sqrt(2 / N)
    tol = 5 * np.sqrt(2 / z.shape[0]) * float(np.diag(e.residual_cov).max())
    np.testing.assert_allclose(np.cov(z.T), e.residual_cov, rtol=0, atol=tol)
    kw = dict(replicates=400, seed=3, bias_correction=False, quiet=True)
    p = bootstrap(rec, est, e, scheme="parametric", **kw)
    r = bootstrap(rec, est, e, scheme="residual", **kw)
    assert p.scheme == "parametric" and p.valid.all()
    np.testing.assert_array_equal(
        p.matrices, bootstrap(rec, est, e, scheme="parametric", **kw).matrices
    )
    # the two schemes describe the same sampling variability
    for name in ("trace", "determinant"):
        wp = p.intervals[name][1] - p.intervals[name][0]
        wr = r.intervals[name][1] - r.intervals[name][0]
        assert 0.75 < wp / wr < 1.33


def test_block_weights_equal_repeated_rows():
    rec = simulate(NODE, [1, 1], [[3, 0], [0, 3]], np.arange(60) * 0.5, process_noise=0.01,
                   seed=2)  # fmt: skip
    est = get_estimator("integral")
    e = est.fit(rec)
    plan = _Plan(rec, est, e)
    runner = _Runner(plan, "blocks", 4, [])
    rng = np.random.default_rng(1)
    w = _block_weights(rng, 5, runner.spans, plan.design.n_rows, runner.block)
    # every segment keeps its number of rows
    for s, t in runner.spans:
        np.testing.assert_array_equal(w[:, s:t].sum(axis=1), t - s)
    theta = plan.refit_weights(w)
    d = plan.design
    G = d.n_groups
    for i in range(5):
        rep = np.repeat(np.arange(d.n_rows), w[i].astype(int))
        # reference: numpy.linalg.lstsq on the repeated rows with group dummies
        X = np.column_stack([d.Z[rep], np.eye(G)[d.groups[rep]]])
        coef = np.linalg.lstsq(X, d.Y[rep], rcond=None)[0]
        np.testing.assert_allclose(theta[i, : 2 * d.n_coef], coef[: d.n_coef].ravel(), rtol=1e-8,
                                   atol=1e-10)  # fmt: skip


# -- coverage on a small fixed-seed simulation ---------------------------------------------
def _coverage(break_noise: bool, monkeypatch: pytest.MonkeyPatch) -> float:
    import fitdyn.bootstrap as bs

    if break_noise:  # a broken scheme that ignores the noise: zero innovations
        orig = bs._Recursion.residuals
        monkeypatch.setattr(
            bs._Recursion, "residuals", lambda self, F, g, k: 0.0 * orig(self, F, g, k)
        )
    est = DiscreteEstimator()
    maxre = float(linalg2.eigvals(SPIRAL[None])[0].real.max())
    hits = []
    for i in range(30):
        rec = _spiral_record(n=150, seed=100 + i, q=0.05, h=0.1)
        u = bootstrap(rec, est, est.fit(rec), replicates=200, seed=7, quiet=True)
        lo, hi = u.intervals["max_real_part"]
        hits.append(lo <= maxre <= hi)
    monkeypatch.undo()
    return float(np.mean(hits))


def test_coverage_small_simulation(monkeypatch):
    # 30 datasets, nominal 95 %: a loose bound that the default scheme passes and a
    # scheme ignoring the noise fails
    assert _coverage(False, monkeypatch) >= 0.8
    assert _coverage(True, monkeypatch) <= 0.5


# -- other estimators and schemes --------------------------------------------------------------
def test_blocks_with_integral_and_derivative():
    rec = simulate(SPIRAL, [1, 2], [3, 0], np.arange(150) * 0.1, measurement_noise=0.05, seed=4)
    for name in ("integral", "derivative"):
        est = get_estimator(name)
        e = est.fit(rec)
        u = bootstrap(rec, est, e, replicates=100, seed=3, quiet=True)
        assert u.scheme == "blocks"
        assert any("moving blocks" in n for n in u.notes)
        lo, hi = u.intervals["trace"]
        assert lo < np.trace(e.matrix) < hi
        assert u.failed_replicates == 0
        u2 = bootstrap(rec, est, e, replicates=100, seed=3, quiet=True)
        np.testing.assert_array_equal(u.matrices, u2.matrices)


def test_parametric_with_trajectory():
    rec = simulate(SPIRAL, [1, 2], [3, 0], np.arange(60) * 0.25, measurement_noise=0.05, seed=6)
    est = get_estimator("trajectory")
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=12, seed=1, quiet=True)
    assert u.scheme == "parametric"
    assert u.valid.sum() >= 10
    lo, hi = u.intervals["max_real_part"]
    assert lo < float(linalg2.eigvals(e.matrix[None])[0].real.max()) < hi


def test_parametric_noise_model_recovers_noise():
    # moments of one-step errors: measurement only, then process only (true model given)
    t = np.arange(3000) * 0.1
    rec_m = simulate(SPIRAL, [1, 2], [3, 0], t, measurement_noise=0.1, seed=1)
    Q, R, _ = noise_model(rec_m, SPIRAL, -SPIRAL @ [1.0, 2.0])
    np.testing.assert_allclose(np.diag(R), [0.01, 0.01], rtol=0.15)
    assert np.max(np.abs(Q)) < 0.002
    rec_p = simulate(SPIRAL, [1, 2], [3, 0], t, process_noise=0.01, seed=1)
    Q, R, _ = noise_model(rec_p, SPIRAL, -SPIRAL @ [1.0, 2.0])
    np.testing.assert_allclose(np.diag(Q), [0.01, 0.01], rtol=0.15)
    assert np.max(np.abs(R)) < 0.002


def test_cases_scheme_several_trajectories():
    x0 = np.random.default_rng(0).normal(0, 3, (6, 2))
    rec = simulate(NODE, [1, 1], x0, np.arange(30) * 0.5, process_noise=0.01, seed=3)
    est = DiscreteEstimator()
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=100, seed=0, scheme="cases", quiet=True)
    assert u.scheme == "cases" and u.failed_replicates == 0
    lo, hi = u.intervals["trace"]
    assert lo < np.trace(e.matrix) < hi


def test_block_length_rule():
    rng = np.random.default_rng(0)
    white = rng.normal(size=(500, 2))
    ar = np.zeros((500, 2))
    for k in range(1, 500):
        ar[k] = 0.9 * ar[k - 1] + rng.normal(size=2)
    seg = np.zeros(500, int)
    assert block_length(white, seg) <= 10
    assert block_length(ar, seg) > block_length(white, seg)


def test_bca_runs_and_is_close_to_percentile_for_a_long_record():
    rec = _spiral_record(n=1500, seed=9)
    est = DiscreteEstimator()
    e = est.fit(rec)
    p = bootstrap(rec, est, e, replicates=400, seed=2, bias_correction=False, quiet=True)
    b = bootstrap(rec, est, e, replicates=400, seed=2, bias_correction=False, method="bca",
                  quiet=True)  # fmt: skip
    assert b.method == "bca"
    width = p.intervals["trace"][1] - p.intervals["trace"][0]
    assert abs(b.intervals["trace"][0] - p.intervals["trace"][0]) < 0.3 * width
    assert abs(b.intervals["trace"][1] - p.intervals["trace"][1]) < 0.3 * width


def test_bias_correction_never_decides_stability():
    # spirals close to a center: the correction may cross the boundary; then the
    # point estimate stays uncorrected and a warning says so
    A = np.array([[-0.01, 1.0], [-1.0, -0.01]])
    est = DiscreteEstimator()
    seen_cross = False
    for s in (5, 7, 1, 2):
        rec = simulate(A, [0, 0], [1, 0], np.arange(150) * 0.2, process_noise=0.02, seed=s)
        e = est.fit(rec)
        u = bootstrap(rec, est, e, replicates=100, seed=1, quiet=True)
        before = linalg2.eigvals(e.matrix[None])[0].real.max() < 0
        after = linalg2.eigvals(u.point_matrix[None])[0].real.max() < 0
        assert before == after
        crossed = any("stability boundary" in w for w in u.warnings)
        seen_cross |= crossed
        if crossed:
            np.testing.assert_allclose(u.point_matrix, e.matrix)
    assert seen_cross


# -- asymptotic ----------------------------------------------------------------------------------
def test_asymptotic_agrees_with_bootstrap_on_a_long_record():
    rec = _spiral_record(n=5000, seed=11, q=0.05)
    est = DiscreteEstimator()
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=600, seed=3, bias_correction=False, quiet=True)
    a = asymptotic(rec, est, e, seed=1)
    assert a.scheme == "asymptotic (delta method)" and a.method == "delta"
    for name in ("trace", "determinant", "max_real_part"):
        lo_b, hi_b = u.intervals[name]
        lo_a, hi_a = a.intervals[name]
        width = hi_b - lo_b
        assert abs(lo_a - lo_b) < 0.15 * width and abs(hi_a - hi_b) < 0.15 * width
    assert a.p_stable == u.p_stable == 1.0
    # the delta interval is symmetric at the normal quantile (scipy.stats.norm reference)
    z = scipy.stats.norm.ppf(0.975)
    lo, hi = a.intervals["trace"]
    centre = np.trace(e.matrix)
    sd = np.sqrt(e.param_cov[0, 0] + e.param_cov[3, 3] + 2 * e.param_cov[0, 3])
    np.testing.assert_allclose([lo, hi], [centre - z * sd, centre + z * sd], rtol=1e-5)


def test_asymptotic_needs_a_covariance():
    from dataclasses import replace

    rec = _spiral_record(n=100)
    est = DiscreteEstimator()
    e = replace(est.fit(rec), param_cov=None)
    with pytest.raises(EstimationError, match="bootstrap"):
        asymptotic(rec, est, e)


def test_uncertainty_is_frozen():
    u = _summ(_cloud(SPIRAL, 0.01, n=50))
    assert isinstance(u, Uncertainty)
    with pytest.raises(AttributeError):
        u.p_stable = 0.5  # type: ignore[misc]


def test_parametric_uses_the_noise_an_estimator_fitted():
    # an estimator that reports its own process and measurement noise (extra keys
    # process_noise, measurement_cov) gets replicates simulated with both
    from dataclasses import replace

    rec = simulate(SPIRAL, [1, 2], [3, 0], np.arange(60) * 0.25, measurement_noise=0.05, seed=6)
    est = get_estimator("trajectory")
    e = est.fit(rec)
    plain = bootstrap(rec, est, e, replicates=12, seed=1, quiet=True)
    Q = np.diag([0.05, 0.05])
    noisy = replace(e, extra={**e.extra, "process_noise": Q, "measurement_cov": e.residual_cov})
    u = bootstrap(rec, est, noisy, replicates=12, seed=1, quiet=True)
    assert any("process noise Q" in n for n in u.notes)
    assert not any("process noise Q" in n for n in plain.notes)
    spread = lambda v: float(np.nanstd(np.trace(v.matrices, axis1=1, axis2=2)))  # noqa: E731
    assert spread(u) > 1.5 * spread(plain)


def test_a_model_too_explosive_to_simulate_fails_its_replicates_instead_of_raising():
    # A parametric bootstrap from a model that overflows over the recording's span
    # (as a bias-corrected model far from its point estimate can): the replicates
    # are counted as failed and said why, the call does not raise.
    rng = np.random.default_rng(5)
    t = np.sort(rng.uniform(0.0, 40.0, 150))
    rec = simulate(np.array([[-0.3, 1.0], [-1.0, -0.3]]), [1.0, 2.0], [3.0, 0.0], t,
                   process_noise=0.02, seed=6)  # fmt: skip
    est = get_estimator("prediction")
    e = est.fit(rec)
    wild = np.array([[40.0, 0.0], [0.0, 30.0]])  # e^(40 * 40) overflows
    bad = replace(e, matrix=wild, offset=-wild @ np.array([1.0, 2.0]))
    u = bootstrap(rec, est, bad, replicates=20, scheme="parametric", bias_correction=False,
                  seed=1, quiet=True)  # fmt: skip
    assert u.failed_replicates == 20
    assert any("overflow" in n or "cannot be simulated" in n for n in u.notes)
    # a step so long that the step's noise covariance itself overflows: the
    # simulation cannot even start; again every replicate fails, with the reason
    t2 = np.r_[t, 55.0]
    rec2 = simulate(np.array([[-0.3, 1.0], [-1.0, -0.3]]), [1.0, 2.0], [3.0, 0.0], t2,
                    process_noise=0.02, seed=6)  # fmt: skip
    e2 = est.fit(rec2)
    bad2 = replace(e2, matrix=wild, offset=-wild @ np.array([1.0, 2.0]))
    u2 = bootstrap(rec2, est, bad2, replicates=10, scheme="parametric", bias_correction=False,
                   seed=1, quiet=True)  # fmt: skip
    assert u2.failed_replicates == 10
    assert any("cannot be simulated" in n for n in u2.notes)
