"""The automatic choice: which estimator for which data, and the reasons recorded."""

from __future__ import annotations

import numpy as np
import pytest

import fitdyn
from fitdyn.errors import NoRealLogarithmError
from fitdyn.estimators import estimate
from fitdyn.estimators.auto import choose_and_fit, residual_lag1

A = np.array([[-0.3, 1.2], [-1.0, -0.2]])
X_STAR = np.array([2.0, -1.0])
T = np.linspace(0, 12, 200)
STARTS = [[4.0, 1.0], [0.0, -3.0], [3.0, -2.0], [-1.0, 2.0], [1.0, 1.0]]


def auto_notes(est):
    return [n for n in est.notes if n.startswith("auto:")]


def test_measurement_noise_chooses_the_trajectory_fit():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=1)
    est, estimator = choose_and_fit(rec)
    assert est.method == "trajectory" == estimator.name
    assert est.settings["chosen_by"] == "auto"
    assert any("measurement noise dominates" in n for n in auto_notes(est))
    assert np.allclose(est.matrix, A, atol=0.05)


def test_uniform_process_noise_chooses_the_discrete_fit():
    pytest.importorskip("fitdyn.estimators.discrete")
    rec = fitdyn.simulate(A, X_STAR, STARTS, T, process_noise=0.05, seed=2)
    est, _ = choose_and_fit(rec)
    assert est.method == "discrete"
    assert any("one-step discrete fit" in n for n in auto_notes(est))


def test_short_process_noise_record_is_not_taken_for_sensor_noise():
    # 50 samples under process noise: the output-error residuals have lag-1
    # autocorrelation 0.40 and pass the Ljung-Box test (p 0.06), which a limit of 0.5
    # took for sensor noise (then the intervals miss the truth); independent sensor
    # noise gives about 0 +- 1/sqrt(50) (common practice, no source)
    t = np.linspace(0, 25, 50, endpoint=False)
    B = np.diag([-0.2, -0.9])
    rec = fitdyn.simulate(B, X_STAR, [4.0, 1.0], t, process_noise=0.05, seed=1)
    _, loose = choose_and_fit(rec, white_lag1=0.5)
    assert loose.name == "trajectory"
    est, _ = choose_and_fit(rec)
    assert est.method == "discrete"
    assert any("not white (lag-1 0.40" in n for n in auto_notes(est))
    # the same short record with sensor noise only still goes to the output-error fit
    rec = fitdyn.simulate(B, X_STAR, [4.0, 1.0], t, measurement_noise=0.05, seed=1)
    assert choose_and_fit(rec)[0].method == "trajectory"


def test_measurement_on_top_of_process_noise_avoids_the_one_step_fit():
    rec = fitdyn.simulate(
        A, X_STAR, [4.0, 1.0], T, process_noise=0.02, measurement_noise=0.05, seed=3
    )
    est, _ = choose_and_fit(rec)
    assert est.method == "instrumental"
    assert any("measurement noise as well" in n for n in auto_notes(est))
    assert any("instruments" in n for n in auto_notes(est))
    assert not any("could not be used" in w for w in est.warnings)


def test_irregular_process_noise_chooses_the_prediction_error_fit():
    t = np.sort(np.r_[0.0, np.random.default_rng(4).uniform(0, 12, 199)])
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], t, process_noise=0.05, seed=4)
    est, _ = choose_and_fit(rec)
    assert est.method == "prediction"
    assert any("irregular steps" in n for n in auto_notes(est))


def _irregular_mixed():
    t = np.sort(np.r_[0.0, np.random.default_rng(5).uniform(0, 140, 279)])
    return fitdyn.simulate(
        np.array([[-0.35, 0.30], [0.15, -0.20]]), [0.0, 0.0], [8.0, 3.0], t,
        process_noise=[[0.002, 0.0], [0.0, 0.0005]], measurement_noise=[0.1, 0.06], seed=5,
    )  # fmt: skip


def test_irregular_mixed_noise_chooses_the_nonlinear_instrumental_fit():
    est, _ = choose_and_fit(_irregular_mixed())
    assert est.method == "nonlinear-iv"
    assert any("measurement noise as well" in n for n in auto_notes(est))
    assert any("expm(A h) on every step" in n for n in auto_notes(est))
    assert not any("could not be used" in w for w in est.warnings)


def test_irregular_mixed_noise_falls_back_with_a_warning(monkeypatch):
    from fitdyn.errors import EstimationError
    from fitdyn.estimators import nonlinear_iv

    def refuse(self, rec, equilibrium=None):
        raise EstimationError("no finite solution (test)")

    monkeypatch.setattr(nonlinear_iv.NonlinearIVEstimator, "fit", refuse)
    est, _ = choose_and_fit(_irregular_mixed())
    assert est.method == "derivative"
    assert any("'nonlinear-iv' refused" in n for n in est.notes)
    assert any("could not be used" in w for w in est.warnings)


def test_discrete_refusal_falls_back(monkeypatch):
    discrete = pytest.importorskip("fitdyn.estimators.discrete")

    def refuse(self, rec, equilibrium=None):
        raise NoRealLogarithmError("negative real eigenvalue of F (test)")

    monkeypatch.setattr(discrete.DiscreteEstimator, "fit", refuse)
    rec = fitdyn.simulate(A, X_STAR, STARTS, T, process_noise=0.05, seed=2)
    est, _ = choose_and_fit(rec)
    assert est.method == "derivative"
    assert any("discrete fit refused" in n for n in auto_notes(est))


def test_choice_is_deterministic():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=5)
    e1, _ = estimate(rec, "auto")
    e2, _ = estimate(rec, "auto")
    assert np.array_equal(e1.matrix, e2.matrix)
    assert e1.notes == e2.notes


def test_settings_are_forwarded_or_listed():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=6)
    est, _ = choose_and_fit(rec, None, noise_sd=(0.1, 0.1), window=11)
    assert est.method == "trajectory"
    assert est.settings["noise_sd"] == (0.1, 0.1)
    assert any("settings not used by 'trajectory': window" in n for n in est.notes)
    # the policy's own settings: no nonlinear fit for long records
    est, _ = choose_and_fit(rec, None, max_trajectory_samples=100)
    assert est.method != "trajectory"
    assert any("no nonlinear trajectory fit" in n for n in auto_notes(est))


def test_known_equilibrium_is_passed_on():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=7)
    est, _ = choose_and_fit(rec, X_STAR)
    assert est.equilibrium_known
    assert np.allclose(est.offset, -est.matrix @ X_STAR)


def test_residual_lag1():
    rng = np.random.default_rng(8)
    white = rng.standard_normal((2000, 2))
    walk = np.cumsum(white, axis=0)
    seg = np.zeros(2000, dtype=int)
    assert abs(residual_lag1(white, seg)) < 0.08
    assert residual_lag1(walk, seg) > 0.95
    # pairs never cross segments: alternating segments leave no pairs
    assert np.isnan(residual_lag1(white[:10], np.arange(10)))


def test_ljung_box_matches_statsmodels_on_one_segment():
    # reference: statsmodels.stats.diagnostic.acorr_ljungbox (Ljung & Box 1978)
    from statsmodels.stats.diagnostic import acorr_ljungbox

    from fitdyn.estimators.auto import ljung_box_p

    rng = np.random.default_rng(0)
    r = rng.normal(size=(300, 2))
    r[:, 1] += 0.3 * np.roll(r[:, 1], 1)
    ours = ljung_box_p(r, np.zeros(300, dtype=int), 10)
    ref = [float(acorr_ljungbox(r[:, j], lags=[10])["lb_pvalue"].iloc[0]) for j in range(2)]
    np.testing.assert_allclose(ours, ref, rtol=1e-10)


def test_process_noise_moves_auto_off_the_output_error_fit():
    # process noise leaves autocorrelated output-error residuals; the trajectory
    # fit ignores it, so auto must not keep it (its intervals would be too narrow)
    A = np.array([[-0.35, 0.30], [0.15, -0.20]])
    rec = fitdyn.simulate(
        A,
        [0.0, 0.0],
        [8.0, 3.0],
        np.arange(300) * 0.5,
        process_noise=[[0.002, 0.0], [0.0, 0.0005]],
        measurement_noise=[0.1, 0.06],
        seed=5,
    )
    est, _ = choose_and_fit(rec)
    assert est.method != "trajectory"
    assert any("Ljung-Box" in n for n in est.notes)


def _chamber_like(seed: int = 5):
    A = np.array([[-0.35, 0.30], [0.15, -0.20]])
    return fitdyn.simulate(
        A,
        [0.0, 0.0],
        [8.0, 3.0],
        np.arange(280) * 0.5,
        process_noise=[[0.002, 0.0], [0.0, 0.0005]],
        measurement_noise=[0.1, 0.06],
        seed=seed,
    )


def test_mixed_noise_chooses_the_instrumental_fit():
    est, _ = choose_and_fit(_chamber_like())
    assert est.method == "instrumental"
    assert not any("too narrow" in w for w in est.warnings)


def test_mixed_noise_warned_about_when_the_instrumental_fit_refuses(monkeypatch):
    from fitdyn.errors import NoRealLogarithmError
    from fitdyn.estimators import instrumental

    def refuse(self, rec, equilibrium=None):
        raise NoRealLogarithmError("no real logarithm (test)")

    monkeypatch.setattr(instrumental.InstrumentalEstimator, "fit", refuse)
    # the nonlinear fit on the same instruments takes over
    est, _ = choose_and_fit(_chamber_like())
    assert est.method == "nonlinear-iv"
    assert any("'instrumental' refused" in n for n in est.notes)
    # and when it refuses too, the derivative regression with the warning
    from fitdyn.estimators import nonlinear_iv

    monkeypatch.setattr(nonlinear_iv.NonlinearIVEstimator, "fit", refuse)
    est, _ = choose_and_fit(_chamber_like())
    assert est.method == "derivative"
    assert any("process noise and measurement noise" in w for w in est.warnings)


def test_pure_measurement_noise_is_not_warned_about_a_mix():
    A = np.array([[-0.3, -1.0], [1.0, -0.3]])
    rec = fitdyn.simulate(A, [1.0, 2.0], [3.0, 0.0], np.linspace(0, 30, 200),
                          measurement_noise=0.05, seed=2)  # fmt: skip
    est, _ = choose_and_fit(rec)
    assert est.method == "trajectory"
    assert not any("measurement noise appear" in w for w in est.warnings)


def test_lag1_t_statistic():
    from fitdyn.estimators.auto import lag1_t

    rng = np.random.default_rng(3)
    seg = np.zeros(4000, dtype=int)
    # independent errors with variances that change from row to row: about N(0, 1)
    white = rng.standard_normal((4000, 2)) * rng.uniform(0.1, 3.0, (4000, 1))
    assert abs(lag1_t(white, seg)) < 3.5
    # one-step errors with sensor noise, e_{k+1} - e_k: lag-1 correlation -1/2
    e = rng.standard_normal((4001, 2))
    ma = e[1:] - e[:-1]
    assert lag1_t(ma, seg) < -10
    # products never pair rows across segments
    seg2 = np.arange(4000) % 2  # every neighbour in another segment: no pairs
    assert np.isnan(lag1_t(ma, seg2))


def test_diagnostic_fit_over_its_budget_is_not_used():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=1)
    est, _ = choose_and_fit(rec, diagnostic_seconds=1e-9)
    assert est.method != "trajectory"
    assert any("did not converge" in n for n in auto_notes(est))


def test_kept_trajectory_fit_bootstraps_with_the_users_budget():
    rec = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, measurement_noise=0.1, seed=1)
    est, estimator = choose_and_fit(rec)
    assert est.method == "trajectory"
    assert estimator.settings["time_budget"] == est.settings["time_budget"] == 30.0
    # the returned estimator refits replicates from the diagnostic point estimate
    V = rec.values[None] + 0.05 * np.random.default_rng(0).standard_normal((4, *rec.values.shape))
    assert estimator.fit_values(rec, V).valid.all()
    assert estimator._reference is not None


def test_diagnostic_fit_skips_its_weighting_only_when_the_verdict_cannot_change():
    # Measurement-noise data from scipy's general ODE solver (solve_ivp, a reference
    # library): the screen must not touch the fit.  Process-noise data: the rounds
    # are skipped and the residuals stay far from white, so auto's choice is the same.
    from scipy.integrate import solve_ivp

    from fitdyn.estimators.auto import AUTO_SETTINGS, SCREEN_MARGIN
    from fitdyn.estimators.trajectory import TrajectoryEstimator

    sol = solve_ivp(lambda t, x: A @ (x - X_STAR), (0, 12), [4.0, 1.0], t_eval=T,
                    rtol=1e-10, atol=1e-12)  # fmt: skip
    noisy = sol.y.T + 0.1 * np.random.default_rng(3).standard_normal(sol.y.T.shape)
    meas = fitdyn.read((T, noisy))
    limit = AUTO_SETTINGS["white_lag1"] + SCREEN_MARGIN
    plain = TrajectoryEstimator().fit(meas)
    screen = TrajectoryEstimator()
    screen._screen_lag1 = limit
    e = screen.fit(meas)
    assert not e.extra["screened"]
    np.testing.assert_array_equal(e.matrix, plain.matrix)
    proc = fitdyn.simulate(A, X_STAR, [4.0, 1.0], T, process_noise=0.3, seed=4)
    full = TrajectoryEstimator().fit(proc)
    screen = TrajectoryEstimator()
    screen._screen_lag1 = limit
    quick = screen.fit(proc)
    assert quick.extra["screened"] and not full.extra["screened"]
    assert quick.extra["iterations"] < full.extra["iterations"]
    for est in (quick, full):
        assert residual_lag1(est.residuals, proc.segment) > AUTO_SETTINGS["white_lag1"]
    assert choose_and_fit(proc)[0].method != "trajectory"
