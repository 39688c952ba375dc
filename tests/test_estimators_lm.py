"""The batched Levenberg-Marquardt core against scipy.optimize.least_squares.

Reference: scipy.optimize.least_squares (method "lm", MINPACK's lmder; a
general-purpose reference library) on the same problems; the test problems are
the exponential-decay fit and the Rosenbrock function written as residuals
(Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006, ch. 10, from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest
from scipy.optimize import least_squares

from fitdyn.estimators.lm import STATUS, levenberg_marquardt


@dataclass
class _Decay:
    t: np.ndarray  # (m,)
    y: np.ndarray  # (B, m)

    def take(self, idx):
        return _Decay(self.t, self.y[idx])


def _decay(theta, prob, jacobian):
    """Residuals of y = c exp(-k t) + d, theta = (c, k, d)."""
    c, k, d = theta[:, :1], theta[:, 1:2], theta[:, 2:3]
    ex = np.exp(-k * prob.t)
    e = c * ex + d - prob.y
    if not jacobian:
        return e, None
    J = np.stack([ex, -c * prob.t * ex, np.ones_like(ex)], axis=-1)
    return e, J


@dataclass
class _Rosen:
    n: int

    def take(self, idx):
        return _Rosen(len(idx))


def _rosen(theta, prob, jacobian):
    x, y = theta[:, 0], theta[:, 1]
    e = np.stack([10.0 * (y - x * x), 1.0 - x], axis=1)
    J = np.zeros((theta.shape[0], 2, 2))
    J[:, 0, 0] = -20.0 * x
    J[:, 0, 1] = 10.0
    J[:, 1, 0] = -1.0
    return e, J


def _problems(B=20, seed=0):
    rng = np.random.default_rng(seed)
    t = np.linspace(0, 5, 40)
    truth = np.column_stack([rng.uniform(1, 3, B), rng.uniform(0.3, 2, B), rng.normal(0, 1, B)])
    y = truth[:, :1] * np.exp(-truth[:, 1:2] * t) + truth[:, 2:3]
    y = y + 0.05 * rng.standard_normal(y.shape)
    start = truth * rng.uniform(0.6, 1.4, truth.shape)
    return _Decay(t, y), start


def test_batch_matches_scipy_least_squares():
    prob, start = _problems()
    sol = levenberg_marquardt(start, prob, _decay, np.sum(prob.y**2, axis=1), 200, 1e-12, 1e-14)
    assert sol.converged.all() and sol.n_failed == 0
    for b in range(start.shape[0]):
        ref = least_squares(
            lambda th, b=b: _decay(th[None], prob.take(np.array([b])), False)[0][0],
            start[b],
            jac=lambda th, b=b: _decay(th[None], prob.take(np.array([b])), True)[1][0],
            method="lm",
            xtol=1e-14,
            ftol=1e-14,
            gtol=1e-14,
        )
        np.testing.assert_allclose(sol.theta[b], ref.x, rtol=1e-7, atol=1e-9)
        assert np.isclose(sol.cost[b], 2 * ref.cost, rtol=1e-10)


def test_batch_equals_loop_of_single_problems():
    prob, start = _problems(B=8, seed=1)
    scale = np.sum(prob.y**2, axis=1)
    batch = levenberg_marquardt(start, prob, _decay, scale, 200, 1e-12, 1e-14)
    for b in range(8):
        idx = np.array([b])
        one = levenberg_marquardt(start[idx], prob.take(idx), _decay, scale[idx], 200, 1e-12, 1e-14)
        np.testing.assert_array_equal(one.theta[0], batch.theta[b])
        assert one.iterations[0] == batch.iterations[b]


def test_rosenbrock_valley():
    start = np.array([[-1.2, 1.0], [0.5, -0.5], [2.0, 2.0]])
    sol = levenberg_marquardt(start, _Rosen(3), _rosen, np.full(3, 100.0), 200, 1e-12)
    assert sol.converged.all()
    np.testing.assert_allclose(sol.theta, 1.0, atol=1e-8)


def test_did_not_converge_is_counted_not_hidden():
    prob, start = _problems(B=6, seed=2)
    start[2] = [1.0, 1e3, 0.0]  # exp(-k t) underflows: no information on k
    start[4] = [np.nan, 1.0, 0.0]  # not finite from the start
    sol = levenberg_marquardt(start, prob, _decay, np.sum(prob.y**2, axis=1), 3, 1e-12, 1e-14)
    # three iterations are too few for some rows: they are reported, not dropped
    assert sol.n_failed == int(np.sum(~sol.converged)) >= 2
    assert not sol.converged[4] and sol.status[4] == 4
    counts = sol.failures()
    assert sum(counts.values()) == sol.n_failed
    assert set(counts) <= set(STATUS.values())
    assert sol.theta.shape == start.shape and sol.residuals.shape == prob.y.shape


def test_time_budget_stops_every_row():
    prob, start = _problems(B=4, seed=3)
    sol = levenberg_marquardt(
        start, prob, _decay, np.sum(prob.y**2, axis=1), 200, 1e-12, 1e-14, time_budget=0.0
    )
    assert not sol.converged.any()
    assert (sol.status == 2).all()
    assert sol.failures() == {STATUS[2]: 4}


@pytest.mark.parametrize("ftol", [1e-10, 1e-20])
def test_cost_tolerance(ftol):
    prob, start = _problems(B=5, seed=4)
    sol = levenberg_marquardt(start, prob, _decay, np.sum(prob.y**2, axis=1), 200, 1e-12, ftol)
    tight = levenberg_marquardt(start, prob, _decay, np.sum(prob.y**2, axis=1), 200, 1e-14, 1e-24)
    assert sol.converged.all()
    assert np.all(sol.cost <= tight.cost * (1 + 1e-8))


@dataclass
class _Rough:
    n: int

    def take(self, idx):
        return _Rough(len(idx))


def _rough(theta, prob, jacobian):
    """Two residuals per parameter, theta - 1 plus and minus a deterministic jitter of
    size 1e-9 that the Jacobian does not know (a rounding floor): no step brings the
    cost below about 1e-18, so the damping runs away there."""
    e = np.concatenate(
        [theta - 1.0 + 1e-9 * np.sin(1e7 * theta), theta - 1.0 - 1e-9 * np.cos(3e7 * theta)],
        axis=1,
    )
    P = theta.shape[1]
    J = np.broadcast_to(np.vstack([np.eye(P), np.eye(P)]), (theta.shape[0], 2 * P, P))
    return e, J.copy()


def test_settle_ends_rows_stuck_at_their_floor_and_damping_starts_the_steps():
    start = np.array([[3.0, -2.0], [0.5, 4.0]])
    scale = np.ones(2)
    # common practice, no source: a cost below the problem's own precision is solved
    stuck = levenberg_marquardt(start, _Rough(2), _rough, scale, 200, 1e-16)
    assert (stuck.status == 3).all()  # the damping ran away at the floor
    done = levenberg_marquardt(start, _Rough(2), _rough, scale, 200, 1e-16, settle=1e-12)
    assert done.converged.all() and (done.status == 0).all()
    assert (done.iterations < stuck.iterations).all()
    np.testing.assert_allclose(done.theta, 1.0, atol=1e-8)
    # a smaller starting damping takes nearly Gauss-Newton steps: the same minimum
    # of the decay problems (as scipy's reference above), in no more iterations
    prob, start = _problems(B=6, seed=5)
    sc = np.sum(prob.y**2, axis=1)
    slow = levenberg_marquardt(start, prob, _decay, sc, 200, 1e-12, 1e-14)
    fast = levenberg_marquardt(start, prob, _decay, sc, 200, 1e-12, 1e-14, damping=1e-8)
    np.testing.assert_allclose(fast.theta, slow.theta, rtol=1e-7, atol=1e-9)
    assert fast.iterations.sum() <= slow.iterations.sum()
