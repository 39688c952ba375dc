"""The contract every estimator must satisfy (one suite, run over all of them).

Test data are exact solutions x(t) = x* + expm(A (t - t0)) (x0 - x*) computed with
scipy.linalg.expm (reference library), independent of fitdyn's own simulator.

Noise-free recovery to a relative 1e-6 needs data whose discretisation error is
below that: the integral form's trapezoid rule has a relative error of about
(h |lambda|)^2 / 12 and the default derivative (Savitzky-Golay cubic fits) about
(h |lambda|)^4, so those run on finely sampled records; the discrete, trajectory,
prediction and nonlinear-iv fits are exact at any step.
"""

from __future__ import annotations

import importlib.util
import json

import numpy as np
import pytest
from scipy.linalg import expm

from fitdyn.errors import EstimationError
from fitdyn.estimators import METHODS, estimate, get_estimator
from fitdyn.recording import KEPT, CleaningLog, Recording, RowFate

A_TRUE = np.array([[-0.3, 1.2], [-1.0, -0.2]])  # stable spiral
X_STAR = np.array([2.0, -1.0])

NAMES = [m for m in METHODS if m != "auto"] + ["auto"]
REGRESSIONS = ["derivative", "integral", "discrete", "instrumental"]

#: samples over [0, 10] that make each method's discretisation error < 1e-6
FINE = {
    "derivative": 2001,
    "integral": 8001,
    "discrete": 201,
    "instrumental": 201,
    "trajectory": 201,
    "kalman": 201,
    "prediction": 201,
    "nonlinear-iv": 201,
    "auto": 8001,
}

#: settings for batch = loop (the derivative's window is otherwise chosen from the
#: recording's own values, once, and reused for replicates)
BATCH_SETTINGS = {"derivative": {"window": 21}}


def _have(name: str) -> bool:
    if name == "auto":
        return True
    from fitdyn.estimators import _REGISTRY

    module = _REGISTRY[name][0] if name in _REGISTRY else f"fitdyn.estimators.{name}"
    return importlib.util.find_spec(module) is not None


def _skip_missing(name: str) -> None:
    if not _have(name):
        pytest.skip(f"estimator module for '{name}' not written yet")


def make_rec(
    A: np.ndarray,
    xs: np.ndarray,
    x0s: list,
    times: list,
    noise: float = 0.0,
    seed: int = 0,
    gaps: list | None = None,
) -> Recording:
    """A Recording of exact solutions, one trajectory per (x0, times) pair.

    ``gaps[r]`` lists sample positions in trajectory ``r`` where a new segment starts.
    """
    rng = np.random.default_rng(seed)
    t_all, v_all, traj, seg = [], [], [], []
    s = 0
    for r, (x0, t) in enumerate(zip(x0s, times, strict=True)):
        t = np.asarray(t, dtype=float)
        dev = expm(A[None] * (t - t[0])[:, None, None]) @ (np.asarray(x0) - xs)
        v = xs + dev
        if noise:
            v = v + noise * v.std(axis=0) * rng.standard_normal(v.shape)
        starts = set(gaps[r]) if gaps else set()
        codes = []
        for i in range(t.size):
            if i in starts:
                s += 1
            codes.append(s)
        s += 1
        t_all.append(t)
        v_all.append(v)
        traj.append(np.full(t.size, r))
        seg.append(np.array(codes))
    n = sum(t.size for t in t_all)
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
        trajectory_names=tuple(str(r + 1) for r in range(len(x0s))),
        log=log,
        source="test",
    )


def exact_rec(name: str, trajectories: int = 1) -> Recording:
    n = FINE[name]
    x0s = [np.array([4.0, 1.0]), np.array([0.0, -3.0]), np.array([3.0, -2.5])][:trajectories]
    return make_rec(A_TRUE, X_STAR, x0s, [np.linspace(0, 10, n)] * trajectories)


def noisy_rec(trajectories: int = 2, seed: int = 1) -> Recording:
    x0s = [np.array([4.0, 1.0]), np.array([0.0, -3.0]), np.array([3.0, -2.5])][:trajectories]
    return make_rec(
        A_TRUE, X_STAR, x0s, [np.linspace(0, 12, 150)] * trajectories, noise=0.03, seed=seed
    )


def fit(name: str, rec: Recording, eq=None, **settings):
    if name == "auto":
        return estimate(rec, "auto", eq, **settings)
    est = get_estimator(name, **settings)
    return est.fit(rec, eq), est


def rel(a, b) -> float:
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))) / np.max(np.abs(b)))


@pytest.mark.parametrize("name", NAMES)
def test_estimate_fields(name):
    _skip_missing(name)
    rec = noisy_rec()
    est, estimator = fit(name, rec)
    assert est.matrix.shape == (2, 2)
    assert est.offset.shape == (2,)
    assert est.equilibrium is not None and est.equilibrium.shape == (2,)
    assert est.residuals.ndim == 2 and est.residuals.shape[1] == 2
    assert est.residuals.shape[0] == est.n_used
    assert est.residual_cov.shape == (2, 2)
    assert np.allclose(est.residual_cov, est.residual_cov.T)
    assert est.param_cov is None or est.param_cov.shape == (6, 6)
    if est.param_cov is not None:
        assert np.all(np.linalg.eigvalsh(est.param_cov) > -1e-12 * np.abs(est.param_cov).max())
    assert all(isinstance(s, str) for s in est.notes + est.warnings)
    assert isinstance(est.settings, dict) and isinstance(est.extra, dict)
    assert est.equilibrium_known is False
    assert np.allclose(est.offset, -est.matrix @ est.equilibrium)
    json.dumps(est.to_dict())
    if name == "auto":
        assert est.settings["chosen_by"] == "auto"
        assert est.method == estimator.name
        assert any(n.startswith("auto:") for n in est.notes)
    else:
        assert est.method == name == estimator.name


@pytest.mark.parametrize("name", NAMES)
def test_noise_free_recovery_offset_estimated(name):
    _skip_missing(name)
    est, _ = fit(name, exact_rec(name))
    assert rel(est.matrix, A_TRUE) < 1e-6
    assert rel(est.equilibrium, X_STAR) < 1e-6
    assert rel(est.offset, -A_TRUE @ X_STAR) < 1e-6


@pytest.mark.parametrize("name", NAMES)
def test_known_equilibrium(name):
    _skip_missing(name)
    est, _ = fit(name, exact_rec(name), X_STAR)
    assert est.equilibrium_known is True
    assert np.array_equal(est.equilibrium, X_STAR)
    assert rel(est.matrix, A_TRUE) < 1e-6
    assert np.allclose(est.offset, -est.matrix @ X_STAR, rtol=1e-12, atol=1e-12)
    # with noise: still consistent and close
    noisy, _ = fit(name, noisy_rec(), X_STAR)
    assert np.allclose(noisy.offset, -noisy.matrix @ X_STAR, rtol=1e-12, atol=1e-12)
    assert rel(noisy.matrix, A_TRUE) < 0.2


@pytest.mark.parametrize("name", NAMES)
def test_several_trajectories(name):
    _skip_missing(name)
    est, _ = fit(name, exact_rec(name, trajectories=3))
    assert rel(est.matrix, A_TRUE) < 1e-6
    assert rel(est.equilibrium, X_STAR) < 1e-6


@pytest.mark.parametrize("name", NAMES)
def test_channel_rescaling_and_shift(name):
    """x' = S x + c gives A' = S A S^-1 and x*' = S x* + c (common practice, no source)."""
    _skip_missing(name)
    rec = noisy_rec()
    S = np.diag([250.0, 0.01])
    c = np.array([-40.0, 7.0])
    rec2 = rec.with_values(rec.values @ S.T + c)
    e1, _ = fit(name, rec)
    e2, _ = fit(name, rec2)
    # rounding: the integral form's columns are nearly collinear with elapsed time
    tol = 1e-5 if name in ("trajectory", "auto") else 1e-7
    assert rel(np.linalg.inv(S) @ e2.matrix @ S, e1.matrix) < tol
    assert np.allclose(e2.equilibrium, S @ e1.equilibrium + c, rtol=tol)


@pytest.mark.parametrize("name", NAMES)
def test_time_shift(name):
    _skip_missing(name)
    rec = noisy_rec()
    shifted = Recording(**{**rec.__dict__, "times": rec.times + 1000.0})
    e1, _ = fit(name, rec)
    e2, _ = fit(name, shifted)
    tol = 1e-5 if name in ("trajectory", "auto") else 1e-8
    assert rel(e2.matrix, e1.matrix) < tol
    assert rel(e2.equilibrium, e1.equilibrium) < tol


@pytest.mark.parametrize("name", REGRESSIONS)
def test_gap_equals_separate_trajectories(name):
    """A gap splits the pairing exactly as a trajectory boundary does."""
    _skip_missing(name)
    t = np.linspace(0, 12, 150)
    x0s = [np.array([4.0, 1.0]), np.array([0.0, -3.0])]
    # two unrelated pieces glued into one trajectory with a gap between them
    glued_t = np.concatenate([t[:80], t[80:] + 0.0])
    one = make_rec(A_TRUE, X_STAR, x0s[:1], [glued_t], noise=0.03, seed=3, gaps=[[80]])
    # replace the second piece by another trajectory's samples (a jump at the gap)
    other = make_rec(A_TRUE, X_STAR, x0s[1:], [t], noise=0.03, seed=4)
    vals = one.values.copy()
    vals[80:] = other.values[80:]
    one = one.with_values(vals)
    two = make_rec(A_TRUE, X_STAR, x0s, [t[:80], t[80:]], noise=0.0)
    two = two.with_values(vals)
    e1, _ = fit(name, one)
    e2, _ = fit(name, two)
    assert np.allclose(e1.matrix, e2.matrix, rtol=1e-10, atol=1e-12)
    assert np.allclose(e1.offset, e2.offset, rtol=1e-10, atol=1e-12)
    assert e1.n_used == e2.n_used


def test_trajectory_runs_through_gaps():
    _skip_missing("trajectory")
    t = np.linspace(0, 10, 201)
    keep = (t < 3) | (t > 5)
    rec = make_rec(A_TRUE, X_STAR, [np.array([4.0, 1.0])], [t[keep]], gaps=[[int((t < 3).sum())]])
    assert rec.n_gaps == 1
    est, _ = fit("trajectory", rec)
    assert rel(est.matrix, A_TRUE) < 1e-6
    assert est.extra["initial_states"].shape == (1, 2)


@pytest.mark.parametrize("name", NAMES)
def test_batch_equals_loop(name):
    _skip_missing(name)
    rec = noisy_rec()
    settings = BATCH_SETTINGS.get(name, {})
    est, estimator = fit(name, rec, **settings)
    rng = np.random.default_rng(7)
    V = rec.values[None] + 0.05 * rec.values.std(axis=0) * rng.standard_normal(
        (3, *rec.values.shape)
    )
    batch = estimator.fit_values(rec, V)
    assert batch.matrix.shape == (3, 2, 2) and batch.offset.shape == (3, 2)
    assert batch.valid.shape == (3,) and batch.valid.all()
    # iterative fits agree to their convergence precision: the state-space fit here
    # has its process noise on the zero bound, where rounding in the score (amplified
    # by the inverse of the tiny noise covariance) limits it to about 1e-8
    tol = {"trajectory": 1e-5, "kalman": 1e-7}.get(estimator.name, 1e-9)
    for k in range(3):
        single = estimator.fit_values(rec, V[k : k + 1])
        assert rel(single.matrix[0], batch.matrix[k]) < tol
        alone = estimator.fit(rec.with_values(V[k]))
        assert rel(alone.matrix, batch.matrix[k]) < tol
        assert rel(alone.offset, batch.offset[k]) < tol


@pytest.mark.parametrize("name", [m for m in NAMES if m != "auto"])
def test_unknown_setting_is_refused(name):
    _skip_missing(name)
    with pytest.raises(EstimationError, match="no setting"):
        get_estimator(name, no_such_setting=1)
