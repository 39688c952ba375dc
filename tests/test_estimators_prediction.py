"""Tests of the one-step prediction-error estimator (fitdyn.estimators.prediction).

Outside references: scipy.linalg.expm and scipy.linalg.expm_frechet (reference
library) for the exact solutions and the closed-form derivative;
scipy.linalg.solve_continuous_lyapunov for the exact step covariance of simulated
process noise (``W(h) = P - F P F^T``, Van Loan 1978 / the Lyapunov form); and
statsmodels' VAR (Luetkepohl, *New Introduction to Multiple Time Series Analysis*,
2005, ch. 3) for the one-step least-squares fit on uniform steps.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm, expm_frechet, solve_continuous_lyapunov

from fitdyn import linalg2
from fitdyn.bootstrap import bootstrap
from fitdyn.errors import EstimationError, TooFewSamplesError
from fitdyn.estimators import get_estimator
from fitdyn.estimators.prediction import PredictionEstimator, frechet_expm, step_pairs
from fitdyn.recording import KEPT, CleaningLog, Recording, RowFate

A_SPIRAL = np.array([[-0.3, 1.2], [-1.0, -0.2]])
A_NODE = np.array([[-0.5, 0.2], [0.1, -2.0]])
X_STAR = np.array([2.0, -1.0])


def _recording(times: list, values: list, gaps: list | None = None) -> Recording:
    """A Recording of given trajectories (one segment each unless ``gaps`` says)."""
    t_all, v_all, traj, seg = [], [], [], []
    s = 0
    for r, (t, v) in enumerate(zip(times, values, strict=True)):
        starts = set(gaps[r]) if gaps else set()
        codes = []
        for i in range(len(t)):
            if i in starts:
                s += 1
            codes.append(s)
        s += 1
        t_all.append(np.asarray(t, dtype=float))
        v_all.append(np.asarray(v, dtype=float))
        traj.append(np.full(len(t), r))
        seg.append(np.array(codes))
    n = sum(len(t) for t in t_all)
    log = CleaningLog(source="test", fates=tuple(RowFate(i, KEPT) for i in range(n)))
    return Recording(
        times=np.concatenate(t_all),
        values=np.concatenate(v_all),
        trajectory=np.concatenate(traj),
        segment=np.concatenate(seg),
        outlier=np.zeros(n, dtype=bool),
        source_rows=np.arange(n),
        channels=("x1", "x2"),
        units=(None, None),
        time_unit=None,
        trajectory_names=tuple(str(r + 1) for r in range(len(t_all))),
        log=log,
        source="test",
    )


def _exact(A, xs, x0, t):
    """x(t) = x* + expm(A (t - t0)) (x0 - x*) by scipy.linalg.expm (reference library)."""
    t = np.asarray(t, dtype=float)
    return xs + np.einsum("kij,j->ki", expm(A[None] * (t - t[0])[:, None, None]), x0 - xs)


def _process(A, xs, x0, t, Q, rng):
    """Exact sampling of dx = A (x - x*) dt + Q^{1/2} dW at times t, independent of fitdyn.

    ``F = expm(A h)`` (scipy.linalg.expm) and ``Cov(w) = P - F P F^T`` with ``A P + P
    A^T + Q = 0`` (scipy.linalg.solve_continuous_lyapunov; A stable).
    """
    P = solve_continuous_lyapunov(A, -Q)
    x = np.empty((len(t), 2))
    x[0] = x0
    for k in range(len(t) - 1):
        F = expm(A * (t[k + 1] - t[k]))
        W = P - F @ P @ F.T
        x[k + 1] = (
            xs + F @ (x[k] - xs) + np.linalg.cholesky(W + 1e-300 * np.eye(2)) @ rng.normal(size=2)
        )
    return x


def _irregular(n, span, rng):
    t = np.sort(rng.uniform(0, span, n))
    t[0] = 0.0
    return t


def rel(a, b) -> float:
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))) / np.max(np.abs(b)))


# ------------------------------------------------------------------ closed forms
@pytest.mark.parametrize("scale", [1e-6, 1e-3, 0.05, 0.5, 2.0, 8.0])
def test_frechet_derivative_matches_scipy(scale):
    """Against scipy.linalg.expm_frechet (reference library), real and complex pairs."""
    rng = np.random.default_rng(11)
    X = rng.normal(size=(200, 2, 2)) * scale
    E = rng.normal(size=(200, 2, 2))
    got = frechet_expm(X, E)
    for k in range(200):
        ref = expm_frechet(X[k], E[k], compute_expm=False)
        assert np.max(np.abs(got[k] - ref)) <= 1e-12 * max(np.max(np.abs(ref)), 1.0)


def test_frechet_derivative_special_matrices():
    """Repeated, defective, nearly trace-free and stiff matrices (scipy reference)."""
    rng = np.random.default_rng(3)
    for X in (
        0.7 * np.eye(2),
        np.array([[-1.0, 1.0], [0.0, -1.0]]),
        np.array([[0.0, 1.0], [-1.0, 0.0]]) * 1e-7,
        np.array([[-1.0, 0.0], [0.0, -60.0]]),
        np.array([[0.0, 3.0], [-3.0, 0.0]]),
    ):
        E = rng.normal(size=(2, 2))
        ref = expm_frechet(X, E, compute_expm=False)
        assert np.allclose(frechet_expm(X, E), ref, rtol=1e-11, atol=1e-13 * np.abs(ref).max())


# ---------------------------------------------------------- (1) uniform steps
def test_uniform_steps_equal_discrete_and_statsmodels_var():
    """On uniform steps the fit is the one-step least squares of the discrete fit.

    The weights 1 / h are then equal, and (A, x*) is a one-to-one
    reparameterisation of the VAR(1) coefficients (F = expm(A h), g = (I - F) x*),
    so both share the optimum; statsmodels' VAR (reference library; Luetkepohl
    2005, ch. 3) computes that least-squares fit independently.
    """
    from statsmodels.tsa.api import VAR

    rng = np.random.default_rng(5)
    h = 0.1
    t = np.arange(400) * h
    x = _process(A_SPIRAL, X_STAR, np.array([5.0, 2.0]), t, np.diag([0.05, 0.02]), rng)
    rec = _recording([t], [x])
    pred = get_estimator("prediction").fit(rec)
    disc = get_estimator("discrete").fit(rec)
    assert rel(pred.matrix, disc.matrix) < 1e-8
    assert rel(pred.offset, disc.offset) < 1e-8
    var = VAR(x).fit(1, trend="c")
    F_var = var.coefs[0]
    g_var = np.asarray(var.intercept)
    F_pred = expm(pred.matrix * h)
    assert rel(F_pred, F_var) < 1e-8
    assert rel((np.eye(2) - F_pred) @ pred.equilibrium, g_var) < 1e-8
    # the standardised errors are the VAR residuals over sqrt(h)
    assert np.allclose(pred.residuals * np.sqrt(h), var.resid, atol=1e-8 * np.abs(x).max())


# ------------------------------------------------------- (2) noise-free, irregular
@pytest.mark.parametrize("A", [A_SPIRAL, A_NODE], ids=["spiral", "node"])
def test_noise_free_irregular_recovery(A):
    rng = np.random.default_rng(2)
    t = _irregular(60, 12.0, rng)
    rec = _recording([t], [_exact(A, X_STAR, np.array([4.0, 1.0]), t)])
    est = get_estimator("prediction").fit(rec)
    assert rel(est.matrix, A) < 1e-8
    assert rel(est.equilibrium, X_STAR) < 1e-8
    assert est.extra["converged"] is True
    assert np.allclose(est.extra["process_noise"], 0.0, atol=1e-12)
    assert np.array_equal(est.extra["measurement_cov"], np.zeros((2, 2)))
    assert est.extra["step_range"] == (float(np.diff(t).min()), float(np.diff(t).max()))
    known = get_estimator("prediction").fit(rec, X_STAR)
    assert rel(known.matrix, A) < 1e-8
    assert np.array_equal(known.equilibrium, X_STAR) and known.equilibrium_known


def test_several_trajectories_and_gaps_never_paired():
    rng = np.random.default_rng(8)
    ts = [_irregular(25, 8.0, rng) for _ in range(3)]
    x0s = [np.array([4.0, 1.0]), np.array([0.0, -3.0]), np.array([3.0, -2.5])]
    vals = [_exact(A_SPIRAL, X_STAR, x0, t) for x0, t in zip(x0s, ts, strict=True)]
    # a jump at a gap inside the second trajectory: pairing across it would break
    # the exact fit
    vals[1][12:] = _exact(A_SPIRAL, X_STAR, np.array([-2.0, 5.0]), ts[1][12:])
    rec = _recording(ts, vals, gaps=[[], [12], []])
    first, _ = step_pairs(rec)
    assert first.size == 75 - 3 - 1
    est = get_estimator("prediction").fit(rec)
    assert est.n_used == first.size == est.residuals.shape[0]
    assert rel(est.matrix, A_SPIRAL) < 1e-8
    assert rel(est.equilibrium, X_STAR) < 1e-8


# ------------------------------------------------ (3) long record, process noise
def test_long_irregular_record_with_process_noise():
    rng = np.random.default_rng(21)
    Q = np.array([[0.04, 0.01], [0.01, 0.02]])
    t = _irregular(6000, 1500.0, rng)
    x = _process(A_SPIRAL, X_STAR, np.array([3.0, 1.0]), t, Q, rng)
    est = get_estimator("prediction").fit(_recording([t], [x]))
    assert rel(est.matrix, A_SPIRAL) < 0.05
    assert rel(est.equilibrium, X_STAR) < 0.05
    Qhat = est.extra["process_noise"]
    assert np.allclose(Qhat, Q, rtol=0.1, atol=0.1 * np.abs(Q).max())
    # the asymptotic standard errors agree with the actual error to a few sd
    sd = np.sqrt(np.diag(est.param_cov))
    err = np.concatenate([(est.matrix - A_SPIRAL).ravel(), est.offset + A_SPIRAL @ X_STAR])
    assert np.all(np.abs(err) < 4.0 * sd)


# ---------------------------------------------- (4) batch = loop, reproducibility
def _noisy_irregular(seed=4, n=200):
    rng = np.random.default_rng(seed)
    t = _irregular(n, 30.0, rng)
    x = _process(A_SPIRAL, X_STAR, np.array([4.0, 1.0]), t, np.diag([0.05, 0.02]), rng)
    return _recording([t], [x])


@pytest.mark.parametrize("weighting", ["step", "noise"])
def test_batched_refit_equals_separate_fits(weighting):
    rec = _noisy_irregular()
    est = PredictionEstimator(weighting=weighting)
    est.fit(rec)
    rng = np.random.default_rng(9)
    V = rec.values[None] + 0.05 * rng.standard_normal((5, *rec.values.shape))
    batch = est.fit_values(rec, V)
    assert batch.valid.all()
    for k in range(5):
        alone = PredictionEstimator(weighting=weighting).fit(rec.with_values(V[k]))
        assert rel(alone.matrix, batch.matrix[k]) < 1e-9
        assert rel(alone.offset, batch.offset[k]) < 1e-9
    # chunking does not change the numbers
    small = PredictionEstimator(weighting=weighting)
    small.fit(rec)
    small._chunk = lambda m, starts: 2  # type: ignore[method-assign]
    chunked = small.fit_values(rec, V)
    assert np.allclose(chunked.matrix, batch.matrix, rtol=1e-12, atol=0)


def test_bootstrap_same_seed_same_numbers():
    rec = _noisy_irregular(n=120)
    est = get_estimator("prediction")
    e = est.fit(rec)
    u1 = bootstrap(rec, est, e, replicates=40, seed=17, quiet=True)
    u2 = bootstrap(rec, est, e, replicates=40, seed=17, quiet=True)
    assert u1.scheme == "parametric"
    assert np.array_equal(u1.matrices, u2.matrices, equal_nan=True)
    assert u1.intervals == u2.intervals
    assert any("process noise Q" in n for n in u1.notes)


def test_non_converged_replicates_are_invalid_not_redrawn():
    rec = _noisy_irregular(n=120)
    est = PredictionEstimator(max_iterations=1)
    e = est.fit(rec)
    assert any("did not converge" in w for w in e.warnings)
    V = rec.values[None] + 0.3 * np.random.default_rng(1).standard_normal((4, rec.n_samples, 2))
    s = est.fit_values(rec, V)
    assert s.matrix.shape == (4, 2, 2)
    assert not s.valid.any() and np.all(np.isnan(s.matrix))


# ------------------------------------------------------- (5) coverage, small check
def _coverage_dataset(i: int):
    """Irregular times, process noise 20 % as in benchmarks/coverage.py (smaller)."""
    rng = np.random.default_rng([77, i])
    if i % 2:
        l1 = -rng.uniform(0.2, 0.4)
        J = np.diag([l1, 3.0 * l1])
    else:
        J = np.array([[-rng.uniform(0.1, 0.3), 1.0], [-1.0, 0.0]])
        J[1, 1] = J[0, 0]
    a = rng.uniform(0, np.pi)
    R = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    A = R @ J @ R.T
    t = _irregular(120, 20.0, rng)
    xs = rng.normal(0, 2.0, 2)
    x0 = xs + rng.normal(0, 3.0, 2)
    sd = _exact(A, xs, x0, t).std(axis=0)
    rho = float(np.max(np.abs(np.linalg.eigvals(A))))
    Q = np.diag((0.2 * sd) ** 2 * rho)
    return A, _recording([t], [_process(A, xs, x0, t, Q, rng)])


def test_small_coverage_check_irregular_process_noise():
    """Nominal 95 % trace intervals of the default bootstrap, 30 datasets.

    Measured with these seeds: the prediction fit (its default, the parametric
    bootstrap, 200 replicates) covers 30 of 30; the derivative regression with its
    default moving-block bootstrap (same seeds and replicates) covers 22 of 30,
    below the bound asserted here.  Each count has a
    binomial sd of about 1.2 at 0.95 (common practice, no source); the bound is
    loose on purpose.
    """
    hits = 0
    for i in range(30):
        A, rec = _coverage_dataset(i)
        est = get_estimator("prediction")
        e = est.fit(rec)
        u = bootstrap(rec, est, e, replicates=200, seed=[5, i], quiet=True)
        lo, hi = u.intervals["trace"]
        hits += bool(lo <= np.trace(A) <= hi)
    assert hits >= 24


# ------------------------------------------------------------ (6) refusals, misc
def test_too_few_pairs_is_refused_in_one_line():
    t = np.array([0.0, 0.4, 1.1, 1.5])
    rec = _recording([t], [_exact(A_SPIRAL, X_STAR, np.array([4.0, 1.0]), t)])
    with pytest.raises(TooFewSamplesError, match="at least 4 pairs") as info:
        get_estimator("prediction").fit(rec)
    assert "\n" not in str(info.value) and "record more samples" in str(info.value)


def test_settings_are_checked():
    with pytest.raises(EstimationError, match="weighting"):
        get_estimator("prediction", weighting="equal")
    with pytest.raises(EstimationError, match="no setting"):
        get_estimator("prediction", tol=1e-3)
    with pytest.raises(EstimationError, match="not a linear regression"):
        get_estimator("prediction").design(_noisy_irregular(n=30))


def test_aliasing_warning_for_long_steps():
    """|Im lambda| h > pi/2 on some steps (the frequency is 3 here)."""
    A = np.array([[-0.1, 3.0], [-3.0, -0.1]])
    rng = np.random.default_rng(6)
    t = np.cumsum(np.concatenate([[0.0], rng.uniform(0.05, 0.7, 80)]))
    rec = _recording([t], [_exact(A, X_STAR, np.array([4.0, 1.0]), t)])
    est = get_estimator("prediction").fit(rec)
    assert any("aliasing risk" in w for w in est.warnings)
    assert rel(est.matrix, A) < 1e-7  # the short steps pin the frequency down


def test_result_is_usable_by_the_bootstrap_and_reports():
    rec = _noisy_irregular(n=150)
    est = get_estimator("prediction")
    e = est.fit(rec)
    assert e.residuals.shape == (rec.n_samples - 1, 2)
    assert np.allclose(e.residual_cov, np.cov(e.residuals.T), rtol=0.05)
    assert e.param_cov is not None and e.param_cov.shape == (6, 6)
    assert e.extra["process_noise"].shape == (2, 2)
    assert np.all(np.linalg.eigvalsh(e.extra["process_noise"]) >= 0)
    assert any("Levenberg-Marquardt" in n for n in e.notes)
    assert linalg2.eigvals(e.matrix).shape == (2,)
    d = e.to_dict()
    assert d["method"] == "prediction" and d["settings"]["weighting"] == "step"


# ----------------------------------------- (6) speed-up regression and time budget
# Values computed with the code of commit 0ba1f56 (before the one-step solver was
# made faster): point estimate, the first three bootstrap replicates and the mean of
# the 40 (all valid) bias-corrected parametric replicates.  The faster code forms
# the powers of the series by products, which moves the converged solutions by
# rounding only (1e-11 relative here).
_BEFORE_POINT = [-0.2742215286459524, 1.259757229160138, -0.9699009421458084, -0.35228237049528616]
_BEFORE_REPS = [
    [-0.24622443037220748, 1.1936383202480567, -1.0480401718259378, -0.3406182670993903],
    [-0.206492425172744, 1.3414100096405905, -0.9663984919580204, -0.2469958561662967],
    [-0.27764175721147455, 1.3053555197343494, -1.0599571325957813, -0.34535956882059216],
]
_BEFORE_MEAN = [-0.255165890951516, 1.2247144204464697, -0.9646552224095115, -0.3584366582293329]


def test_results_equal_those_before_the_speed_up():
    rec = _noisy_irregular(n=120)
    est = get_estimator("prediction")
    e = est.fit(rec)
    u = bootstrap(rec, est, e, replicates=40, seed=17, quiet=True)
    assert u.bias_corrected
    assert np.allclose(e.matrix.ravel(), _BEFORE_POINT, rtol=1e-9, atol=0)
    assert np.allclose(u.matrices[:3].reshape(3, 4), _BEFORE_REPS, rtol=1e-8, atol=0)
    assert np.all(np.isfinite(u.matrices))
    assert np.allclose(u.matrices.mean(axis=0).ravel(), _BEFORE_MEAN, rtol=1e-8, atol=0)


def test_time_budget_none_changes_nothing_and_bad_budgets_are_refused():
    rec = _noisy_irregular(n=120)
    a = PredictionEstimator().fit(rec)
    b = PredictionEstimator(time_budget=None).fit(rec)
    assert np.array_equal(a.matrix, b.matrix)
    for bad in (0, -1.0, float("nan"), "soon"):
        with pytest.raises(EstimationError, match="time_budget"):
            PredictionEstimator(time_budget=bad)


def test_spent_time_budget_fails_the_remaining_replicates_at_once():
    from fitdyn.estimators.lm import STATUS

    rec = _noisy_irregular(n=120)
    V = rec.values[None] + 0.05 * np.random.default_rng(2).standard_normal((6, rec.n_samples, 2))
    # a budget far too short: the point fit stops unconverged and says so, and the
    # refits find the budget spent before their first chunk
    est = PredictionEstimator(time_budget=1e-9)
    e = est.fit(rec)
    assert any("did not converge" in w and "time budget" in w for w in e.warnings)
    s = est.fit_values(rec, V)
    assert not s.valid.any() and np.all(np.isnan(s.matrix))
    assert est.last_failures == {"replicates": 6, "failed": 6, "reasons": {STATUS[2]: 6}}


def test_time_budget_is_shared_by_all_refits_of_one_point_fit(monkeypatch):
    import fitdyn.estimators.lm as lm

    rec = _noisy_irregular(n=120)
    V = rec.values[None] + 0.05 * np.random.default_rng(2).standard_normal((6, rec.n_samples, 2))
    est = PredictionEstimator(time_budget=5.0)
    est.fit(rec)
    first = est.fit_values(rec, V)
    assert first.valid.all() and est.last_failures["reasons"] == {}
    # the clock jumps past the budget the first call started: a second call (say
    # the bias-correction stage) draws on the same budget and fails at once, where
    # a fresh budget would have left it five seconds
    real = lm.time.perf_counter

    class _Clock:
        @staticmethod
        def perf_counter() -> float:
            return real() + 10.0

    monkeypatch.setattr(lm, "time", _Clock)
    second = est.fit_values(rec, V)
    assert not second.valid.any()
    assert est.last_failures["reasons"] == {lm.STATUS[2]: 6}
    # a new point fit starts a new budget
    est.fit(rec)
    assert est.fit_values(rec, V).valid.all()


@pytest.mark.parametrize("A", [A_SPIRAL, A_NODE, np.array([[0.4, 1.0], [0.3, -0.2]])])
def test_process_noise_moments_inverts_the_exact_step_covariances(A):
    # The step covariance W(h; Q) = int_0^h expm(A s) Q expm(A s)^T ds from Van Loan's
    # 4x4 block exponential (Van Loan, IEEE Trans. Autom. Control 23, 1978) with
    # scipy.linalg.expm, summed over irregular steps; errors whose sum of squares is
    # exactly that sum must give Q back (a saddle included: no Lyapunov form needed).
    from fitdyn.estimators.prediction import process_noise_moments

    Q = np.array([[0.3, 0.05], [0.05, 0.2]])
    h = np.random.default_rng(3).uniform(0.01, 0.8, 60)
    S = np.zeros((2, 2))
    for hk in h:
        blk = np.zeros((4, 4))
        blk[:2, :2], blk[:2, 2:], blk[2:, 2:] = -A, Q, A.T
        E = expm(blk * hk)
        S += E[2:, 2:].T @ E[:2, 2:]
    m, n_par = h.size, 6
    target = S / (m / (m - n_par / 2.0))  # undo the degrees-of-freedom correction
    r = np.zeros((m, 2))
    r[:2] = np.linalg.cholesky(target).T
    np.testing.assert_allclose(process_noise_moments(A, h, r, n_par), Q, rtol=1e-9, atol=1e-12)


def test_nearly_singular_fit_is_the_least_squares_minimum_of_scipy():
    # A slow mode (eigenvalues about -1.1 and -0.002) on irregular steps with process
    # noise: the equilibrium is barely fixed by the data.  The fit (x* eliminated by
    # variable projection) must be the minimum of the weighted one-step objective
    # sum_k |D^-1 (x_{k+1} - x* - expm(A h_k)(x_k - x*))|^2 / h_k (D: the channels'
    # standard deviations, the "step" weighting) that
    # scipy.optimize.least_squares (MINPACK's lmder, a reference library) reaches
    # from the same point with scipy.linalg.expm, and it must take few iterations.
    from scipy.optimize import least_squares

    from fitdyn.simulate import simulate

    A = np.array([[-1.0, 0.5], [0.196, -0.1]])
    rng = np.random.default_rng(31)
    t = np.sort(rng.uniform(0.0, 40.0, 200))
    t[0] = 0.0
    rec = simulate(A, X_STAR, [4.0, 1.0], t, process_noise=np.diag([0.05, 0.05]), seed=rng)
    e = PredictionEstimator(weighting="step").fit(rec)
    first, h = step_pairs(rec)
    y0, y1 = rec.values[first], rec.values[first + 1]
    sd = rec.values.std(axis=0)

    def resid(th):
        Ah, xs = th[:4].reshape(2, 2), th[4:]
        F = expm(Ah[None] * h[:, None, None])
        r = (y1 - xs - np.einsum("kij,kj->ki", F, y0 - xs)) / sd
        return (r / np.sqrt(h)[:, None]).ravel()

    th = np.concatenate([e.matrix.ravel(), e.equilibrium])
    ref = least_squares(resid, th, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15)
    cost, best = np.sum(resid(th) ** 2), 2 * ref.cost
    assert cost <= best * (1 + 1e-9)
    np.testing.assert_allclose(e.matrix, ref.x[:4].reshape(2, 2), rtol=1e-5, atol=1e-7)
    assert e.extra["iterations"] <= 60
