"""Tests of the exact-discretisation simulator (fitdyn/simulate.py).

Reference values come from general-purpose libraries, named beside each check:
scipy.linalg.expm, scipy.integrate.solve_ivp, scipy.linalg.solve_continuous_lyapunov,
scipy.integrate.quad_vec and scipy.stats.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import scipy.stats
from scipy.integrate import quad_vec, solve_ivp

import fitdyn
from fitdyn.errors import FitdynError, InputError, TimeError
from fitdyn.recording import Recording
from fitdyn.simulate import SimulatedBatch, discretise, simulate, write_csv

STABLE_NODE = np.array([[-0.35, 0.30], [0.15, -0.20]])  # eigenvalues -0.05, -0.5
STABLE_SPIRAL = np.array([[0.0, 1.0], [-4.0, -0.4]])  # -0.2 +- 1.99i
SADDLE = np.array([[0.2, 1.5], [-0.04, -0.5]])  # 0.1, -0.4
UNSTABLE_SPIRAL = np.array([[0.1, -1.0], [1.0, 0.05]])
Q_FULL = np.array([[0.04, 0.01], [0.01, 0.02]])


def _irregular(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.concatenate([[0.3], 0.3 + np.cumsum(rng.uniform(0.05, 0.6, n - 1))])


# -- deterministic trajectories ------------------------------------------------------
@pytest.mark.parametrize("A", [STABLE_NODE, STABLE_SPIRAL, SADDLE, UNSTABLE_SPIRAL])
def test_noise_free_matches_scipy_expm(A):
    xs = np.array([1.5, -0.7])
    x0 = np.array([3.0, 0.4])
    t = _irregular(60, 1)
    rec = simulate(A, xs, x0, t)
    # reference: x(t) = x* + expm(A (t - t0)) (x0 - x*), scipy.linalg.expm
    ref = np.array([xs + scipy.linalg.expm(A * (ti - t[0])) @ (x0 - xs) for ti in t])
    np.testing.assert_allclose(rec.values, ref, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("A", [STABLE_SPIRAL, SADDLE])
def test_noise_free_matches_solve_ivp(A):
    xs = np.array([0.05, 0.0])
    x0 = np.array([0.4, -0.2])
    t = _irregular(40, 2)
    rec = simulate(A, xs, x0, t)
    # reference: scipy.integrate.solve_ivp of dx/dt = A (x - x*), tight tolerances
    sol = solve_ivp(lambda _t, x: A @ (x - xs), (t[0], t[-1]), x0, t_eval=t, rtol=1e-11, atol=1e-12)
    assert sol.success
    np.testing.assert_allclose(rec.values, sol.y.T, rtol=1e-7, atol=1e-8)


# -- transition covariance -----------------------------------------------------------
def _quadrature_cov(A: np.ndarray, Q: np.ndarray, h: float) -> np.ndarray:
    # reference: scipy.integrate.quad_vec of integral_0^h expm(A s) Q expm(A s)^T ds
    def integrand(s: float) -> np.ndarray:
        E = scipy.linalg.expm(A * s)
        return E @ Q @ E.T

    val, _err = quad_vec(integrand, 0.0, h, epsabs=1e-13, epsrel=1e-11)
    return val


@pytest.mark.parametrize("A", [STABLE_NODE, STABLE_SPIRAL])
def test_covariance_stable_equals_lyapunov_and_quadrature(A):
    steps = np.array([0.1, 0.5, 2.0, 7.5])
    F, C = discretise(A, steps, Q_FULL)
    # reference: P from scipy.linalg.solve_continuous_lyapunov (A P + P A^T = -Q);
    # Cov(w) = P - F P F^T
    P = scipy.linalg.solve_continuous_lyapunov(A, -Q_FULL)
    for k, h in enumerate(steps):
        Fk = scipy.linalg.expm(A * h)  # reference: scipy.linalg.expm
        np.testing.assert_allclose(F[k], Fk, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(C[k], P - Fk @ P @ Fk.T, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(C[k], _quadrature_cov(A, Q_FULL, h), rtol=1e-8, atol=1e-12)
    _, C_lyap = discretise(A, steps, Q_FULL, method="lyapunov")
    np.testing.assert_allclose(C_lyap, C, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("A", [SADDLE, UNSTABLE_SPIRAL])
def test_covariance_unstable_van_loan_equals_quadrature(A):
    steps = np.array([0.2, 1.0, 3.0])
    _, C = discretise(A, steps, Q_FULL)
    for k, h in enumerate(steps):
        np.testing.assert_allclose(C[k], _quadrature_cov(A, Q_FULL, h), rtol=1e-8, atol=1e-12)
        assert np.all(np.linalg.eigvalsh(C[k]) > 0)
    with pytest.raises(InputError, match="stable"):
        discretise(A, steps, Q_FULL, method="lyapunov")


def test_covariance_zero_step_and_scalar_q():
    F, C = discretise(STABLE_SPIRAL, [0.0, 0.3], 0.5)
    np.testing.assert_allclose(F[0], np.eye(2), atol=1e-15)
    np.testing.assert_allclose(C[0], 0.0, atol=1e-15)
    np.testing.assert_allclose(C[1], _quadrature_cov(STABLE_SPIRAL, 0.5 * np.eye(2), 0.3))


def test_covariance_long_step_falls_back_to_stationary():
    # exp(|lambda| h) overflows in the block exponential; Cov(w) -> P for long steps
    A = np.array([[-1.0, 0.2], [0.0, -2.0]])
    _, C = discretise(A, [2000.0], Q_FULL)
    P = scipy.linalg.solve_continuous_lyapunov(A, -Q_FULL)  # reference: scipy
    np.testing.assert_allclose(C[0], P, rtol=1e-10)


# -- noise statistics ----------------------------------------------------------------
@pytest.mark.parametrize("A", [STABLE_NODE, SADDLE])
def test_one_step_increments_have_transition_covariance(A):
    h, B = 0.8, 40000
    xs = np.array([2.0, -1.0])
    x0 = np.array([3.0, 0.5])
    batch = simulate(A, xs, x0, [0.0, h], process_noise=Q_FULL, replicates=B, seed=11)
    F, C = discretise(A, [h], Q_FULL)
    w = batch.values[:, 1] - (xs + F[0] @ (x0 - xs))
    # sampling tolerance: sd of a sample covariance entry is about
    # sqrt((C_ii C_jj + C_ij^2) / B) (Gaussian case, common practice, no source)
    emp = np.cov(w.T)
    sd = np.sqrt((np.outer(np.diag(C[0]), np.diag(C[0])) + C[0] ** 2) / B)
    assert np.all(np.abs(emp - C[0]) < 5 * sd)
    assert np.all(np.abs(w.mean(axis=0)) < 5 * np.sqrt(np.diag(C[0]) / B))


def test_singular_process_noise_drives_through_dynamics():
    # force noise on the velocity only (a rank-one Q), as in a torque-driven rig
    Q = np.array([[0.0, 0.0], [0.0, 0.3]])
    h, B = 0.5, 30000
    batch = simulate(
        STABLE_SPIRAL, None, [0.0, 0.0], [0.0, h], process_noise=Q, replicates=B, seed=5
    )
    C = _quadrature_cov(STABLE_SPIRAL, Q, h)  # reference: scipy quad_vec
    emp = np.cov(batch.values[:, 1].T)
    sd = np.sqrt((np.outer(np.diag(C), np.diag(C)) + C**2) / B)
    assert np.all(np.abs(emp - C) < 5 * sd)


def test_stationary_variance_of_long_path():
    A = np.array([[-1.0, 0.5], [-0.3, -1.5]])
    xs = np.array([10.0, -4.0])
    t = np.arange(40000) * 0.25
    rec = simulate(A, xs, xs, t, process_noise=Q_FULL, seed=3)
    P = scipy.linalg.solve_continuous_lyapunov(A, -Q_FULL)  # reference: scipy
    tail = rec.values[200:]
    # loose: about 10^4 time units / ~1 time unit correlation -> a few % error
    np.testing.assert_allclose(np.cov(tail.T), P, rtol=0.08, atol=0.02 * np.max(np.abs(P)))
    np.testing.assert_allclose(tail.mean(axis=0), xs, atol=0.01)


def test_measurement_noise_standard_deviations():
    t = np.linspace(0.0, 5.0, 6)
    B = 20000
    clean = simulate(SADDLE, [1.0, 2.0], [1.5, 2.1], t)
    noisy = simulate(
        SADDLE, [1.0, 2.0], [1.5, 2.1], t, measurement_noise=[0.1, 0.3], replicates=B, seed=8
    )
    e = noisy.values - clean.values[None]
    sd = e.reshape(-1, 2).std(axis=0)
    n = e.shape[0] * e.shape[1]
    # sd of a sample sd is about sd / sqrt(2 n) (Gaussian case, common practice, no source)
    np.testing.assert_allclose(sd, [0.1, 0.3], atol=5 * 0.3 / np.sqrt(2 * n))
    assert abs(np.corrcoef(e.reshape(-1, 2).T)[0, 1]) < 5 / np.sqrt(n)
    # a scalar is one sd for both channels
    one = simulate(SADDLE, None, [0.0, 0.0], t, measurement_noise=0.2, replicates=B, seed=9)
    np.testing.assert_allclose(one.values.reshape(-1, 2).std(axis=0), 0.2, rtol=0.02)


def test_full_measurement_covariance():
    Rcov = np.array([[0.04, -0.018], [-0.018, 0.09]])
    t = np.linspace(0.0, 1.0, 5)
    b = simulate(STABLE_NODE, None, [0.0, 0.0], t, measurement_cov=Rcov, replicates=20000, seed=2)
    np.testing.assert_allclose(np.cov(b.values.reshape(-1, 2).T), Rcov, atol=0.003)
    with pytest.raises(InputError, match="not both"):
        simulate(STABLE_NODE, None, [0, 0], t, measurement_noise=0.1, measurement_cov=Rcov)


# -- seeds, shapes, trajectories -----------------------------------------------------
def test_same_seed_same_numbers():
    t = _irregular(50, 4)
    kw = {"process_noise": Q_FULL, "measurement_noise": [0.05, 0.1]}
    a = simulate(STABLE_SPIRAL, [0, 0], [1, 0], t, seed=123, **kw)
    b = simulate(STABLE_SPIRAL, [0, 0], [1, 0], t, seed=123, **kw)
    c = simulate(STABLE_SPIRAL, [0, 0], [1, 0], t, seed=124, **kw)
    g = simulate(STABLE_SPIRAL, [0, 0], [1, 0], t, seed=np.random.default_rng(123), **kw)
    np.testing.assert_array_equal(a.values, b.values)
    np.testing.assert_array_equal(a.values, g.values)
    assert not np.allclose(a.values, c.values)


def test_irregular_times_several_trajectories():
    times = [_irregular(30, 1), _irregular(45, 2), np.array([0.0, 0.7, 1.1])]
    x0 = np.array([[1.0, 0.0], [0.0, 1.0], [-1.0, 2.0]])
    xs = np.array([0.2, -0.1])
    rec = simulate(
        STABLE_SPIRAL,
        xs,
        x0,
        times,
        channels=("angle", "rate"),
        time_unit="s",
        units=("rad", "rad/s"),
    )
    assert isinstance(rec, Recording)
    n = 30 + 45 + 3
    assert rec.values.shape == (n, 2) and rec.times.shape == (n,)
    np.testing.assert_array_equal(rec.trajectory, np.repeat([0, 1, 2], [30, 45, 3]))
    np.testing.assert_array_equal(rec.segment, rec.trajectory)
    assert rec.trajectory_names == ("1", "2", "3")
    assert rec.n_trajectories == 3 and rec.n_gaps == 0
    assert rec.channels == ("angle", "rate") and rec.units == ("rad", "rad/s")
    assert rec.time_unit == "s"
    assert rec.log.balanced() and rec.log.kept_rows == n and rec.log.source == "simulated"
    np.testing.assert_array_equal(rec.source_rows, np.arange(n))
    assert not rec.outlier.any()
    for k, (name, t, v) in enumerate(rec.trajectories()):
        assert name == str(k + 1)
        np.testing.assert_array_equal(t, times[k])
        # reference: scipy.linalg.expm
        ref = np.array(
            [xs + scipy.linalg.expm(STABLE_SPIRAL * (ti - t[0])) @ (x0[k] - xs) for ti in t]
        )
        np.testing.assert_allclose(v, ref, rtol=1e-10, atol=1e-12)


def test_shared_times_and_trajectory_count():
    t = np.linspace(0, 3, 31)
    rec = simulate(STABLE_NODE, None, [1.0, 1.0], t, trajectories=4, process_noise=0.01, seed=1)
    assert rec.n_trajectories == 4 and rec.values.shape == (124, 2)
    np.testing.assert_array_equal(rec.times, np.tile(t, 4))
    # independent noise per trajectory
    assert not np.allclose(rec.values[:31], rec.values[31:62])
    with pytest.raises(InputError, match="trajectories"):
        simulate(STABLE_NODE, None, np.zeros((3, 2)), t, trajectories=2)
    with pytest.raises(InputError, match="trajectories"):
        simulate(STABLE_NODE, None, [0, 0], [t, t], trajectories=3)


def test_single_sample_trajectory():
    rec = simulate(STABLE_NODE, [1, 1], [2, 3], [5.0])
    np.testing.assert_array_equal(rec.values, [[2.0, 3.0]])


def test_replicates_shapes_and_one_code_path():
    t = _irregular(25, 6)
    kw = {"process_noise": Q_FULL, "measurement_noise": 0.05}
    single = simulate(SADDLE, [0, 0], [0.3, 0.1], t, seed=42, **kw)
    batch1 = simulate(SADDLE, [0, 0], [0.3, 0.1], t, seed=42, replicates=1, **kw)
    assert isinstance(batch1, SimulatedBatch)
    np.testing.assert_array_equal(batch1.values[0], single.values)
    batch = simulate(SADDLE, [0, 0], [0.3, 0.1], [t, t[:10]], seed=42, replicates=7, **kw)
    assert batch.values.shape == (7, 35, 2) and batch.n_replicates == 7
    np.testing.assert_array_equal(batch.trajectory, np.repeat([0, 1], [25, 10]))
    rec = batch.recording(3)
    np.testing.assert_array_equal(rec.values, batch.values[3])
    assert rec.trajectory_names == ("1", "2")


def test_replicates_equal_single_runs_in_distribution():
    t = np.linspace(0.0, 4.0, 9)
    args = (STABLE_SPIRAL, [0.1, 0.0], [0.5, -0.5], t)
    kw = {"process_noise": Q_FULL, "measurement_noise": [0.05, 0.1]}
    B = 600
    batch = simulate(*args, replicates=B, seed=0, **kw).values
    loop = np.stack([simulate(*args, seed=1000 + b, **kw).values for b in range(B)])
    assert batch.shape == loop.shape == (B, 9, 2)
    # two-sample Kolmogorov-Smirnov test per time and channel (scipy.stats.ks_2samp);
    # with 18 tests, a family-wise level of about 1e-3
    pvals = [
        scipy.stats.ks_2samp(batch[:, k, j], loop[:, k, j]).pvalue
        for k in range(9)
        for j in range(2)
    ]
    assert min(pvals) > 1e-3 / 18
    # lag correlation along the path is reproduced as well
    c_batch = np.corrcoef(batch[:, 4, 0], batch[:, 5, 0])[0, 1]
    c_loop = np.corrcoef(loop[:, 4, 0], loop[:, 5, 0])[0, 1]
    assert abs(c_batch - c_loop) < 0.15


# -- bad input -----------------------------------------------------------------------
@pytest.mark.parametrize(
    "kwargs, error",
    [
        ({"matrix": np.eye(3)}, InputError),
        ({"times": [0.0, 1.0, 1.0]}, TimeError),
        ({"times": [0.0, np.nan]}, TimeError),
        ({"process_noise": [[1.0, 2.0], [2.0, 1.0]]}, InputError),
        ({"process_noise": -1.0}, InputError),
        ({"measurement_noise": [0.1, 0.2, 0.3]}, InputError),
        ({"x0": [1.0, 2.0, 3.0]}, InputError),
        ({"replicates": 0}, InputError),
    ],
)
def test_bad_input_raises_one_line(kwargs, error):
    base = {"matrix": STABLE_NODE, "equilibrium": None, "x0": [0.0, 0.0], "times": [0.0, 1.0, 2.0]}
    base.update(kwargs)
    with pytest.raises(error) as info:
        simulate(**base)
    assert isinstance(info.value, FitdynError) and "\n" not in str(info.value)


def test_overflow_is_reported():
    with pytest.raises(InputError, match="overflow"):
        simulate(np.diag([5.0, 1.0]), None, [1.0, 1.0], np.linspace(0, 400, 5))


# -- writing -------------------------------------------------------------------------
def test_write_csv_layout_and_atomic(tmp_path):
    t = np.linspace(0, 2, 5)
    one = simulate(
        STABLE_NODE, None, [1, 1], t, channels=("air", "wall"), time_unit="s", units=("K", "K")
    )
    path = write_csv(one, tmp_path / "one.csv")
    frame = pd.read_csv(path)
    assert list(frame.columns) == ["time [s]", "air [K]", "wall [K]"]
    np.testing.assert_allclose(frame.to_numpy(), np.column_stack([one.times, one.values]))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["one.csv"]

    many = simulate(
        STABLE_NODE, None, [1, 1], t, trajectories=2, process_noise=0.1, replicates=3, seed=1
    )
    path = write_csv(
        many, tmp_path / "many.csv", replicate=2, sep=";", decimal=",", comments=["made by a test"]
    )
    text = path.read_text()
    assert text.startswith("# made by a test\nrun;time;x1;x2\n")
    back = pd.read_csv(path, sep=";", decimal=",", comment="#")
    assert back["run"].tolist() == [1] * 5 + [2] * 5
    np.testing.assert_allclose(back[["x1", "x2"]].to_numpy(), many.values[2])
    with pytest.raises(InputError, match="replicate"):
        write_csv(many, tmp_path / "x.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["many.csv", "one.csv"]


def test_write_csv_round_trip_through_reader(tmp_path):
    pytest.importorskip("fitdyn.importer")
    rec = simulate(
        STABLE_SPIRAL,
        [0.05, 0.0],
        [[0.4, 0.0], [-0.3, 0.2]],
        [_irregular(20, 1), _irregular(15, 2)],
        measurement_noise=0.01,
        seed=1,
        channels=("angle", "rate"),
        time_unit="s",
        units=("rad", "rad/s"),
    )
    path = write_csv(rec, tmp_path / "rig.csv")
    back = fitdyn.read(path)
    assert back.n_trajectories == 2 and back.n_samples == 35
    assert back.channels == ("angle", "rate")
    np.testing.assert_allclose(back.values, rec.values, rtol=1e-12)
    np.testing.assert_allclose(back.times, rec.times, rtol=1e-12)


def test_overflow_raises_or_fails_only_the_overflowing_replicates():
    from fitdyn.errors import InputError

    A = np.array([[0.9, 0.0], [0.0, 0.5]])
    t = np.linspace(0.0, 1000.0, 50)  # e^(0.9 * 1000) overflows double precision
    with pytest.raises(InputError, match="overflow"):
        simulate(A, None, [1.0, 1.0], t, replicates=3, seed=1)
    with pytest.raises(InputError, match="overflow must be"):
        simulate(A, None, [1.0, 1.0], t, replicates=3, seed=1, overflow="ignore")
    out = simulate(A, None, [1.0, 1.0], t, replicates=3, seed=1, overflow="nan")
    assert np.isnan(out.values).all()  # every replicate overflows: each is all NaN
    ok = simulate(-A, None, [1.0, 1.0], t, replicates=3, seed=1, overflow="nan")
    assert np.isfinite(ok.values).all()
    np.testing.assert_array_equal(
        ok.values, simulate(-A, None, [1.0, 1.0], t, replicates=3, seed=1).values
    )
