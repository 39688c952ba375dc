"""Output-error trajectory fit: exactness, covariance, weights, starts, edge cases.

Outside references: scipy.integrate.solve_ivp (data from a general ODE solver) and
scipy.optimize.least_squares (the same weighted problem solved by MINPACK).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import least_squares

import fitdyn
from fitdyn.errors import EstimationError
from fitdyn.estimators import trajectory as tr
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
    report = est.extra["parameter_report"]
    assert "a11" in report and "xs1" in report and "+/-" in report
    # lmfit is no longer imported by a fit (its import took over a second)
    import subprocess
    import sys

    code = (
        "import sys, fitdyn; from fitdyn.estimators.trajectory import TrajectoryEstimator; "
        "rec = fitdyn.simulate([[-0.3, 1], [-1, -0.3]], [0, 0], [2, 0], "
        "[0.1 * k for k in range(80)], measurement_noise=0.05, seed=1); "
        "TrajectoryEstimator().fit(rec); print('lmfit' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
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


# -- the batched solver --------------------------------------------------------------------


def _solve_ivp_recording(A, xs, x0, t, noise, seed):
    """Samples of dx/dt = A (x - x*) from scipy.integrate.solve_ivp (a general ODE
    solver, not fitdyn's simulator), plus Gaussian measurement noise."""
    sol = solve_ivp(lambda _, x: A @ (x - xs), (t[0], t[-1]), x0, t_eval=t, rtol=1e-11, atol=1e-12)
    rng = np.random.default_rng(seed)
    X = sol.y.T + noise * rng.standard_normal(sol.y.T.shape)
    return fitdyn.read((t, X))


def _batch_problem(kind, seed=0, R=1):
    rng = np.random.default_rng(seed)
    n = 30
    traj = np.repeat(np.arange(R), n // R)
    tau = np.tile(np.sort(rng.uniform(0, 1, n // R)), R)
    prob = tr._Problem(
        tau=tau,
        traj=traj,
        y=rng.standard_normal((n, 2)),
        n_traj=R,
        mu=np.zeros(2),
        sd=np.ones(2),
        T=1.0,
        eq=np.array([0.3, -0.2]) if kind == "known" else None,
    )
    bt = tr._batch(prob, kind, rng.standard_normal((3, n, 2)), rng.uniform(0.5, 2.0, (3, 2)))
    P = bt.n_par
    theta = rng.standard_normal((3, P))
    theta[:, :4] = np.array(
        [[-1.0, 2.0, -1.5, -0.5], [0.4, 0.3, 0.5, -0.9], [-2.0, 0.1, 0.0, -2.1]]
    )
    return bt, theta


@pytest.mark.parametrize("kind", ["equilibrium", "offset", "known"])
@pytest.mark.parametrize("R", [1, 3])
def test_analytic_jacobian_matches_finite_differences(kind, R):
    bt, theta = _batch_problem(kind, seed=R, R=R)
    _, J = tr._evaluate(theta, bt, True)
    step = 1e-6
    for k in range(theta.shape[1]):
        d = np.zeros_like(theta)
        d[:, k] = step
        fd = (tr._evaluate(theta + d, bt, False)[0] - tr._evaluate(theta - d, bt, False)[0]) / (
            2 * step
        )
        np.testing.assert_allclose(J[..., k], fd, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("kind", ["equilibrium", "offset", "known"])
def test_projected_jacobian_matches_finite_differences(kind):
    """Kaufman's variable-projection Jacobian has the exact gradient J' e, and the
    products the solver is given (J'J and J'e, formed without the projection) are
    those of that Jacobian."""
    bt, theta = _batch_problem(kind, seed=5)
    a = theta[:, :4]
    _, e, Jr = tr._projected(a, bt, True)
    _, normal, _ = tr._evaluate_projected(a, bt, True)
    JrT = np.swapaxes(Jr, 1, 2)
    np.testing.assert_allclose(normal.jtj, JrT @ Jr, rtol=1e-8, atol=1e-10 * np.abs(JrT @ Jr).max())
    np.testing.assert_allclose(normal.grad, np.einsum("bmi,bm->bi", Jr, e), rtol=1e-7,
                               atol=1e-9 * np.abs(normal.grad).max())  # fmt: skip
    step = 1e-6
    for k in range(4):
        d = np.zeros_like(a)
        d[:, k] = step
        cp = np.sum(tr._evaluate_projected(a + d, bt, True)[0] ** 2, axis=1)
        cm = np.sum(tr._evaluate_projected(a - d, bt, True)[0] ** 2, axis=1)
        grad = 2 * np.einsum("bm,bm->b", Jr[..., k], e)
        np.testing.assert_allclose(grad, (cp - cm) / (2 * step), rtol=1e-5, atol=1e-7)


def test_point_fit_matches_scipy_least_squares():
    """The batched solver's minimum is scipy.optimize.least_squares' (reference library)
    on the same weighted output-error problem."""
    rec = spiral(noise=0.1, seed=8)
    est = TrajectoryEstimator(weights=(1.0, 1.0))
    fit = est.fit(rec)
    prob = est._problem(rec, rec.values, None)
    w = prob.sd * np.ones(2)
    bt = tr._batch(prob, "equilibrium", prob.y, w)
    theta0 = est._reference["theta"] * (1 + 0.01 * np.arange(8))
    ref = least_squares(
        lambda th: tr._evaluate(th[None], bt, False)[0].ravel(),
        theta0,
        jac=lambda th: tr._evaluate(th[None], bt, True)[1][0].reshape(-1, th.size),
        method="lm",
        xtol=1e-14,
        ftol=1e-14,
        gtol=1e-14,
    )
    A_ref = prob.to_original_A(ref.x[:4].reshape(2, 2))
    np.testing.assert_allclose(fit.matrix, A_ref, rtol=1e-6, atol=1e-8)


def test_fit_on_solve_ivp_data():
    A = np.array([[-0.4, 1.3], [-0.9, -0.1]])
    xs = np.array([1.5, -0.5])
    t = np.sort(np.r_[0.0, np.random.default_rng(9).uniform(0, 12, 149)])
    rec = _solve_ivp_recording(A, xs, np.array([4.0, 2.0]), t, 0.0, 0)
    est = TrajectoryEstimator().fit(rec)
    # exact data up to the ODE solver's tolerance
    np.testing.assert_allclose(est.matrix, A, atol=1e-7)
    np.testing.assert_allclose(est.equilibrium, xs, atol=1e-7)
    noisy = _solve_ivp_recording(A, xs, np.array([4.0, 2.0]), t, 0.05, 1)
    fit = TrajectoryEstimator().fit(noisy)
    err = np.abs(fit.matrix - A).max()
    sd = np.sqrt(np.diag(fit.param_cov))[:4].max()
    assert err < 4 * sd, (err, sd)


def test_fit_values_batch_equals_loop_and_counts_failures():
    rec = spiral(noise=0.1, seed=10)
    est = TrajectoryEstimator()
    fit = est.fit(rec)
    rng = np.random.default_rng(11)
    model = rec.values - fit.residuals
    V = model[None] + 0.1 * rng.standard_normal((5, *rec.values.shape))
    V[3] = np.nan  # a replicate that cannot be fitted
    batch = est.fit_values(rec, V)
    assert batch.valid.tolist() == [True, True, True, False, True]
    assert est.last_failures["did_not_converge"] == 1
    assert sum(est.last_failures["reasons"].values()) == 1
    for k in (0, 4):
        one = est.fit_values(rec, V[k : k + 1])
        np.testing.assert_allclose(one.matrix[0], batch.matrix[k], rtol=1e-12, atol=1e-14)


def test_iteration_cap_reports_non_convergence():
    rec = spiral(noise=0.1, seed=12)
    rng = np.random.default_rng(13)
    V = rec.values[None] + 0.3 * rng.standard_normal((6, *rec.values.shape))
    # a converged point fit whose refits get one iteration each
    est = TrajectoryEstimator()
    assert est.fit(rec).extra["success"]
    est.settings["max_iterations"] = 1
    out = est.fit_values(rec, V)
    assert est.last_failures["did_not_converge"] == int(np.sum(~out.valid)) > 0
    assert "iteration cap reached" in est.last_failures["reasons"]
    # a point fit stopped by the cap: its replicates all fail at once, with the reason
    capped = TrajectoryEstimator(max_iterations=1)
    fit = capped.fit(rec)
    assert not fit.extra["success"] and any("did not converge" in w for w in fit.warnings)
    out = capped.fit_values(rec, V)
    assert not out.valid.any() and np.all(np.isnan(out.matrix))
    assert capped.last_failures["reasons"] == {"the point fit did not converge": 6}


def test_bootstrap_chunks_share_one_time_budget():
    # the bootstrap refits a point fit in chunks (calls of fit_values): the budget is
    # spent across all of them, not renewed per call; a new point fit renews it
    rec = spiral(noise=0.1, seed=14)
    est = TrajectoryEstimator()
    fit = est.fit(rec)
    V = (rec.values - fit.residuals)[None] + 0.0 * rec.values[None]
    est.settings["time_budget"] = 1e-9  # the refits' budget, spent at once
    assert not est.fit_values(rec, V).valid.any()
    assert est.last_failures["reasons"] == {"time budget spent": 1}
    est.settings["time_budget"] = None  # the next chunk still has the spent budget
    assert not est.fit_values(rec, V).valid.any()
    assert est.last_failures["reasons"] == {"time budget spent": 1}
    est.fit(rec)
    assert est.fit_values(rec, V).valid.all()


def test_diverging_saddle_is_fitted_quickly():
    # a saddle over a span where the unstable mode grows 500-fold
    A = np.array([[0.3, 0.4], [0.5, -0.6]])
    t = np.linspace(0, 10, 200)
    clean = fitdyn.simulate(A, [0.0, 0.0], [1.0, 1.0], t)
    rec = fitdyn.simulate(
        A, [0.0, 0.0], [1.0, 1.0], t, measurement_noise=0.03 * clean.values.std(axis=0), seed=1
    )
    est = TrajectoryEstimator()
    fit = est.fit(rec)
    assert fit.extra["success"]
    assert fit.extra["iterations"] < 200
    boot = est.fit_values(rec, (rec.values - fit.residuals)[None] + 0.0 * rec.values[None])
    assert boot.valid.all()
    np.testing.assert_allclose(boot.matrix[0], fit.matrix, atol=1e-6)


# Fuzz finds (tests/test_fuzz.py): a few samples with one value near 3e16.  Before the
# batched solver these took 7 to 36 s; the fitted model then grows by e^90 over the
# record and matches the samples only through digits double precision does not hold.
JUMP_FILES = {
    "late-jump": "#c\ntime,a,b\n0.0,-4.77742e-201,9.00771\n1.0,-1.22555e-175,-0.333333\n"
    "2.0,-7.44475,-6.0039\n3.0,-5.93929,-5.44391\n4.0,-1.02206,-7.053e-42\n5.0,0,0\n"
    "6.0,0,3.1080664327161948e+16",
    "zeros-then-jump": "time,a,b\r0.0,0.0,0\r1.0,0,0\r2.0,0,0\r3.0,0.0,0\r4.0,0.0,0\r5.0,0,0\r"
    "6.0,0.0,0.0\r7.0,0.0,0.0\r8.0,3.229091129361084e+16,2.89226e+16",
}


@pytest.fixture(params=sorted(JUMP_FILES))
def jump_recording(request, tmp_path):
    path = tmp_path / f"{request.param}.csv"
    path.write_text(JUMP_FILES[request.param], newline="")
    return fitdyn.read(path)


def test_a_model_beyond_double_precision_is_refused_in_one_line(jump_recording):
    with pytest.raises(EstimationError, match="double precision does not hold") as info:
        TrajectoryEstimator().fit(jump_recording)
    msg = str(info.value)
    assert "\n" not in msg and jump_recording.source in msg
    assert "channel 'b' at row 9" in msg or "channel 'a' at row 10" in msg  # the jump
    # replicates of such data are failed replicates, never a confident answer
    est = TrajectoryEstimator()
    out = est.fit_values(jump_recording, jump_recording.values[None])
    assert not out.valid.any()
    assert est.last_failures["reasons"] == {"model beyond double precision": 1}


def test_jump_files_end_with_a_refusal_or_a_flagged_finite_fit(jump_recording):
    with pytest.raises(EstimationError, match="double precision"):
        fitdyn.fit(jump_recording, method="trajectory", bootstrap=0)
    for bootstrap in (0, 200):
        try:
            res = fitdyn.fit(jump_recording, method="auto", bootstrap=bootstrap, seed=3)
        except EstimationError as exc:
            assert "\n" not in str(exc)
            continue
        assert "trajectory" not in res.method  # the diagnostic fit was not used
        assert np.all(np.isfinite(res.matrix)) and np.all(np.isfinite(res.eigenvalues))
        res.to_json()


def test_a_fast_but_representable_growth_is_still_fitted():
    # an unstable node growing 1e6-fold over the record (solve_ivp data, noise-free):
    # far below the precision limit, so it is fitted, not refused
    A = np.array([[0.7, 0.1], [0.0, 0.5]])
    t = np.linspace(0.0, 20.0, 60)
    rec = _solve_ivp_recording(A, np.zeros(2), np.array([1e-3, 2e-3]), t, 0.0, 0)
    fit = TrajectoryEstimator().fit(rec)
    np.testing.assert_allclose(fit.matrix, A, atol=1e-6)


def test_bootstrap_replicates_beyond_double_precision_count_as_failed():
    # replicates refitted from a point fit (the bootstrap's path): the one with a jump
    # to 3e16 in its last sample is a failed replicate with its reason, the clean one not
    rec = spiral(n=9, noise=0.1, seed=3, times=np.arange(9.0))
    est = TrajectoryEstimator()
    est.fit(rec)
    V = np.repeat(rec.values[None], 3, axis=0)
    V[1, -1] = [3.229091129361084e16, 2.89226e16]
    V[2, :-1] = 0.0
    V[2, -1] = [3.229091129361084e16, 2.89226e16]
    out = est.fit_values(rec, V)
    assert out.valid.tolist() == [True, False, False]
    assert est.last_failures["reasons"] == {"model beyond double precision": 2}
    assert np.all(np.isnan(out.matrix[1:]))
