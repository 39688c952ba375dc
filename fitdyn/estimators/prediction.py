"""One-step prediction-error fit: exact for observed states with process noise, any steps.

Under ``dx = A (x - x*) dt + Q^{1/2} dW`` with the states observed (no measurement
noise), consecutive samples of one gap-free segment, ``h_k`` apart, obey exactly

    x_{k+1} - x* = expm(A h_k) (x_k - x*) + w_k,     w_k ~ N(0, W(h_k)),
    W(h) = integral_0^h expm(A s) Q expm(A s)^T ds,

whatever the steps.  The one-step prediction errors ``r_k = x_{k+1} - x* -
expm(A h_k) (x_k - x*)`` are independent, so their Gaussian likelihood, conditional
on each segment's first sample, is the likelihood of the record: the
prediction-error method for observed states (Ljung, *System Identification: Theory
for the User*, 2nd ed., 1999, prediction-error methods).  Pairs never cross gaps
or trajectories.

The fit
-------
``theta = (a11, a12, a21, a22, x*1, x*2)`` (``A`` only with a known equilibrium)
minimises the weighted sum of squares

    sum_k || L^{-1} r_k ||^2 / h_k,

the Gaussian one-step likelihood with ``W(h_k)`` replaced by its small-step form
``h_k Q`` and ``Q = L L^T`` held fixed.  By default (``weighting="step"``) ``L`` is
the diagonal of the channels' spreads, so the fit does not depend on the
channels' units.  ``weighting="noise"`` adds a second pass with ``L`` the Cholesky
factor of the covariance of the first pass's standardised errors ``r_k /
sqrt(h_k)`` (feasible generalised least squares; the estimate then transforms
with any invertible linear change of the channels).  Every fixed weighting is
consistent (``E[r_k | x_k] = 0`` at the truth) and only the efficiency differs:
``benchmarks/prediction_weighting.py`` finds no gain from the second pass (matrix
RMSE 0.467 against 0.467 on the coverage benchmark's irregular process-noise
data, and 0.96 against 0.94 -- slightly worse -- when the noise enters one
correlated direction, where ``h_k Q`` misstates ``W(h_k)`` of the longer steps),
so one pass is the default.  On uniform steps every
weighting gives the one-step least-squares (VAR(1)) fit of the ``discrete``
estimator mapped by the matrix logarithm, whose parameters are a one-to-one
reparameterisation of it.

The solver is the shared batched Levenberg-Marquardt core
(:mod:`fitdyn.estimators.lm`, Marquardt's diagonal scaling) on a leading batch
axis: every replicate has its own damping, convergence flag and iteration count;
the point fit is the one-replicate case of the same code that refits bootstrap
replicates (:meth:`PredictionEstimator.fit_values`), in chunks of bounded memory.
``expm(A h_k)`` is :func:`fitdyn.linalg2.expm`, its derivative with respect to
``A`` the Frechet derivative in closed form (:func:`frechet_expm`; for a 2x2
matrix ``expm(X) = f0 I + f1 M`` with ``M`` the trace-free part, and the derivative
follows from ``f0``, ``f1`` and ``d f1 / d q``).  When ``x*`` is fitted it is
eliminated (variable projection, :func:`_evaluate_projected`): the errors are affine
in ``x*``, so for each ``A`` it is a 2x2 least-squares solve and the iterations run
on ``A`` alone.  With ``x*`` as a free parameter a nearly singular ``A`` (a slow
mode, an equilibrium the data barely fix) left a long flat valley along which the
solver crawled to its iteration cap; in ``benchmarks/trajectory_speed.py``'s auto
point fits on irregular steps with process noise that took up to 200 iterations,
now under 20.

Starts (point fit): the first-order (Euler) regression of ``(x_{k+1} - x_k) / h_k``
on ``x_k`` with weights ``h_k`` (the small-step form of this objective), the
integral-form estimate, and for oscillatory starts the same matrices with the
frequency scaled by ``frequencies``; the lowest objective wins.  Bootstrap
replicates start from the point estimate (when it was fitted on the same
sampling).

The process noise ``Q`` is estimated from the point fit's one-step errors by
moments, inverting the exact map ``Q -> sum_k W(h_k)`` (linear in ``Q``; Van Loan's
block exponential through :func:`fitdyn.simulate.discretise`), with the degrees of
freedom corrected; the parametric bootstrap simulates replicates with it.  This
model has no measurement noise: measurement errors are amplified by ``1 / h_k`` on
short steps and bias ``A`` toward zero (use the ``instrumental`` fit or a Kalman
filter likelihood when both noises show).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import EstimationError, FitdynError, SamplingError, TooFewSamplesError
from fitdyn.estimators.base import (
    Estimate,
    NonlinearEstimator,
    SystemBatch,
    equilibrium_from,
)
from fitdyn.estimators.derivative import check_equilibrium, reject_unknown, replicate_values
from fitdyn.estimators.lm import STATUS, Solution, TimeBudget, levenberg_marquardt
from fitdyn.recording import Recording

__all__ = ["PredictionEstimator", "frechet_expm", "step_pairs", "process_noise_moments"]

#: ``|Im lambda| h`` above which a step risks aliasing (as the discrete fit warns).
ALIASING_LIMIT = np.pi / 2
#: longest / shortest step above which the fit warns about the spread of weights
STEP_RATIO_LIMIT = 1e6
#: memory budget (bytes) of one batched chunk of Levenberg-Marquardt (small enough
#: that a chunk's (B, m) work arrays stay in cache: 16 MB ran the bootstraps of
#: benchmarks/coverage.py's irregular datasets 10-20 % faster than 64 MB; the
#: numbers do not depend on it)
_CHUNK_BYTES = 16 * 2**20
#: bytes per (replicate x start x pair) inside the solver (Jacobian and temporaries)
_BYTES_PER_PAIR = 8 * 120
_SERIES_Q = 1e-2  # |q| below which d f1 / d q uses its series
_NEED_PAIRS = 4
#: the unit matrices E_11, E_12, E_21, E_22 (directions of a11, a12, a21, a22)
_UNIT = np.eye(4).reshape(4, 2, 2)


# ----------------------------------------------------------------------------------
# closed-form 2x2 exponential and its Frechet derivative
# ----------------------------------------------------------------------------------
def _coefficients(X: np.ndarray) -> tuple[np.ndarray, ...]:
    """``f0, f1, g`` with ``expm(X) = f0 I + f1 M`` and ``g = d f1 / d q``.

    ``X = s I + M`` with ``s = tr X / 2`` and ``M^2 = q I``; ``f0 = e^s cosh r``,
    ``f1 = e^s sinh(r) / r`` (``r = sqrt q``, imaginary for ``q < 0``) and ``g =
    e^s (r cosh r - sinh r) / (2 r^3)``, in real arithmetic for both signs of ``q``.
    """
    a, b, c, d = X[..., 0, 0], X[..., 0, 1], X[..., 1, 0], X[..., 1, 1]
    s = 0.5 * (a + d)
    hh = 0.5 * (a - d)
    q = hh * hh + b * c
    r = np.sqrt(np.abs(q))
    pos = q >= 0
    large = pos & (r >= 1.0)
    small = np.abs(q) < _SERIES_Q
    neg = ~pos
    mid = ~(large | small)  # where the direct mid-range formulas are used
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        rl = np.where(large, r, 1.0)
        ep = np.exp(s + rl)
        em = np.exp(s - rl)
        es = np.exp(s)
        rs = np.where(large | small, 1.0, r)  # r of the direct mid-range formulas
        # each transcendental once, and only where its branch is selected (the
        # elementwise values are those of evaluating both branches everywhere)
        sh = np.sinh(rs, where=pos & mid, out=np.ones_like(rs))
        ch = np.cosh(rs, where=pos & mid, out=np.ones_like(rs))
        sn = np.sin(rs, where=neg, out=np.ones_like(rs))
        cs = np.cos(rs, where=neg & mid, out=np.ones_like(rs))
        cr = np.cos(r, where=neg, out=np.ones_like(r))
        chr_ = np.cosh(np.where(large, 0.0, r), where=pos & ~large, out=np.ones_like(r))
        f0 = np.where(large, 0.5 * (ep + em), np.where(pos, es * chr_, es * cr))
        f1_mid = np.where(pos, sh, sn) / rs
        # powers by products: numpy's general power is several times slower than
        # the rest of this function together (the values agree to rounding)
        q2 = q * q
        q3 = q2 * q
        f1_small = 1.0 + q / 6.0 + q2 / 120.0 + q3 / 5040.0 + (q2 * q2) / 362880.0
        f1 = np.where(large, 0.5 * (ep - em) / rl, es * np.where(small, f1_small, f1_mid))
        g_large = ((rl - 1.0) * ep + (rl + 1.0) * em) / (4.0 * (rl * rl * rl))
        g_mid = np.where(pos, rs * ch - sh, sn - rs * cs) / (2.0 * (rs * rs * rs))
        g_small = 1.0 / 6.0 + q / 60.0 + q2 / 1680.0 + q3 / 90720.0
        g = np.where(large, g_large, es * np.where(small, g_small, g_mid))
    return s, hh, q, f0, f1, g


def frechet_expm(X: np.ndarray, E: np.ndarray) -> np.ndarray:
    """Frechet derivative of the matrix exponential of 2x2 matrices, in closed form.

    ``L(X, E) = d/de expm(X + e E) at e = 0``, batched over leading axes.

    Parameters
    ----------
    X : ndarray, shape (..., 2, 2)
    E : ndarray, shape (..., 2, 2) or (k, ..., 2, 2)
        Direction(s), broadcast against ``X``; a leading axis of several directions
        shares the work on ``X``.

    Returns
    -------
    ndarray, the broadcast shape of ``X`` and ``E``

    Notes
    -----
    With ``X = s I + M`` and ``M^2 = q I``, ``expm(X) = f0 I + f1 M`` where ``f0`` and
    ``f1`` depend on ``s`` and ``q`` only, so ``L = (f0 ds + f1 dq / 2) I + (f1 ds +
    g dq) M + f1 dM`` with ``ds = tr E / 2``, ``dM = E - ds I``, ``dq = 2 m11 dm11 +
    m12 dm21 + m21 dm12`` and ``g = d f1 / d q``.
    """
    X = np.asarray(X, dtype=float)
    E = np.asarray(E, dtype=float)
    s, hh, q, f0, f1, g = _coefficients(X)
    ds = 0.5 * (E[..., 0, 0] + E[..., 1, 1])
    dh = 0.5 * (E[..., 0, 0] - E[..., 1, 1])
    dq = 2.0 * hh * dh + X[..., 0, 1] * E[..., 1, 0] + X[..., 1, 0] * E[..., 0, 1]
    alpha = f0 * ds + 0.5 * f1 * dq
    beta = f1 * ds + g * dq
    M = X - s[..., None, None] * np.eye(2)
    dM = E - ds[..., None, None] * np.eye(2)
    return alpha[..., None, None] * np.eye(2) + beta[..., None, None] * M + f1[..., None, None] * dM


def _unit_frechet_times(
    X: np.ndarray,
    tau: np.ndarray,
    d0: np.ndarray,
    d1: np.ndarray,
    coefficients: tuple[np.ndarray, ...] | None = None,
):
    """``L(X, tau E_c) d`` for the four unit directions ``E_11, E_12, E_21, E_22``.

    The formula of :func:`frechet_expm` specialised to ``E = tau E_c`` and applied
    to the vectors ``d = (d0, d1)`` (each (B, m)), all in elementwise arithmetic;
    ``coefficients`` is what :func:`_coefficients` returned for ``X``, when known.

    Returns
    -------
    ndarray, shape (B, m, 2, 4)
        ``[..., i, c]``: component ``i`` of ``L(X, tau E_c) d``.
    """
    s, hh, q, f0, f1, g = _coefficients(X) if coefficients is None else coefficients
    t = np.broadcast_to(tau, s.shape)
    x01, x10 = X[..., 0, 1], X[..., 1, 0]
    # M d with M = X - s I
    Md0 = hh * d0 + x01 * d1
    Md1 = x10 * d0 - hh * d1
    out = np.empty((*s.shape, 2, 4))
    # the products shared by the four directions, each formed once; the sign flips
    # and halvings are exact, so the values are those of the direction-wise formula
    hf1 = 0.5 * f1
    # c = 11 and 22: ds = tau / 2, dq = +-hh tau, dM = +-tau diag(1, -1) / 2
    ds = 0.5 * t
    f0ds = f0 * ds
    f1ds = f1 * ds
    hht = hh * t
    a2 = hf1 * hht
    b2 = g * hht
    w = hf1 * t
    wd0 = w * d0
    wd1 = w * d1
    alpha = f0ds + a2
    beta = f1ds + b2
    out[..., 0, 0] = alpha * d0 + beta * Md0 + wd0
    out[..., 1, 0] = alpha * d1 + beta * Md1 - wd1
    alpha = f0ds - a2
    beta = f1ds - b2
    out[..., 0, 3] = alpha * d0 + beta * Md0 - wd0
    out[..., 1, 3] = alpha * d1 + beta * Md1 + wd1
    # c = 12 (dq = x10 tau, dM = tau E_12) and c = 21 (dq = x01 tau, dM = tau E_21)
    f1t = f1 * t
    for c, xq, dd in ((1, x10, d1), (2, x01, d0)):
        dq = xq * t
        alpha = hf1 * dq
        beta = g * dq
        v0 = alpha * d0 + beta * Md0
        v1 = alpha * d1 + beta * Md1
        if c == 1:
            v0 += f1t * dd
        else:
            v1 += f1t * dd
        out[..., 0, c] = v0
        out[..., 1, c] = v1
    return out


# ----------------------------------------------------------------------------------
# pairs and the one-step problem
# ----------------------------------------------------------------------------------
def step_pairs(rec: Recording, method: str = "prediction") -> tuple[np.ndarray, np.ndarray]:
    """Consecutive sample pairs within gap-free segments and their steps.

    Parameters
    ----------
    rec : Recording
    method : str
        Name used in the error messages.

    Returns
    -------
    first : int ndarray, shape (m,)
        Index of ``x_k`` of each pair (``x_{k+1}`` is ``first + 1``).
    h : ndarray, shape (m,)
        The steps ``t_{k+1} - t_k`` (all positive).

    Raises
    ------
    TooFewSamplesError
        Fewer than four pairs.
    SamplingError
        A step that is not positive.
    """
    seg = np.asarray(rec.segment)
    first = np.flatnonzero(seg[1:] == seg[:-1])
    if first.size < _NEED_PAIRS:
        raise TooFewSamplesError(
            f"the {method} fit needs at least {_NEED_PAIRS} pairs of consecutive samples "
            f"within a gap-free segment, found {first.size}; record more samples",
            source=rec.source,
        )
    t = np.asarray(rec.times, dtype=float)
    h = t[first + 1] - t[first]
    bad = np.flatnonzero(~(h > 0))
    if bad.size:
        k = int(first[bad[0]])
        raise SamplingError(
            f"the step after time {float(t[k]):.6g} is {float(h[bad[0]]):.6g}, not positive; "
            "merge repeated times or sort the time column",
            source=rec.source,
            row=int(rec.source_rows[k + 1]),
        )
    return first, h


@dataclass
class _Problem:
    """One chunk of one-step problems in internal units (leading batch axis B)."""

    u0: np.ndarray  # (B, m, 2) x_k, internal units
    u1: np.ndarray  # (B, m, 2) x_{k+1}
    tau: np.ndarray  # (m,) steps / T
    root: np.ndarray  # (m,) 1 / sqrt(tau)
    eq: np.ndarray | None  # (B, 2) known equilibrium, internal units
    Linv: np.ndarray  # (B, 2, 2) channel whitening

    @property
    def n_par(self) -> int:
        return 4 if self.eq is not None else 6

    def take(self, idx: np.ndarray) -> _Problem:
        return _Problem(
            u0=self.u0[idx],
            u1=self.u1[idx],
            tau=self.tau,
            root=self.root,
            eq=None if self.eq is None else self.eq[idx],
            Linv=self.Linv[idx],
        )


def _unpack(theta: np.ndarray, prob: _Problem) -> tuple[np.ndarray, np.ndarray]:
    A = theta[:, :4].reshape(-1, 2, 2)
    xs = prob.eq if prob.eq is not None else theta[:, 4:6]
    return A, xs


def _apply2(L: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``L[b] @ v[b, k]`` for (B, 2, 2) ``L`` and ``v`` of shape (B, m, 2, ...)."""
    ext = (slice(None), None) + (None,) * (v.ndim - 3)
    v0, v1 = v[:, :, 0], v[:, :, 1]
    return np.stack(
        [
            L[:, 0, 0][ext] * v0 + L[:, 0, 1][ext] * v1,
            L[:, 1, 0][ext] * v0 + L[:, 1, 1][ext] * v1,
        ],
        axis=2,
    )


def _is_identity(L: np.ndarray) -> bool:
    """Whether every (2, 2) block of ``L`` is the identity (channel weighting off).

    Then the products with ``L`` are skipped: they would multiply by one and add
    zeros, which leaves finite values unchanged (a row with a non-finite value fails
    either way).
    """
    return bool(np.all(L[:, 0, 0] == 1.0) and np.all(L[:, 1, 1] == 1.0)
                and not np.any(L[:, 0, 1]) and not np.any(L[:, 1, 0]))  # fmt: skip


def _evaluate(
    theta: np.ndarray, prob: _Problem, jacobian: bool
) -> tuple[np.ndarray, np.ndarray | None]:
    """Weighted errors ``e`` (B, m, 2) and, optionally, ``de / dtheta`` (B, m, 2, P).

    Written with explicit 2x2 products (elementwise arithmetic on (B, m) arrays),
    which numpy runs several times faster than the equivalent einsums.
    """
    A, xs = _unpack(theta, prob)
    X = A[:, None] * prob.tau[None, :, None, None]  # (B, m, 2, 2)
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        F = linalg2.expm(X)
        dev = prob.u0 - xs[:, None, :]
        d0, d1 = dev[..., 0], dev[..., 1]
        Fd = np.stack(
            [F[..., 0, 0] * d0 + F[..., 0, 1] * d1, F[..., 1, 0] * d0 + F[..., 1, 1] * d1],
            axis=-1,
        )
        r = prob.u1 - xs[:, None, :] - Fd
        white = _is_identity(prob.Linv)
        e = (r if white else _apply2(prob.Linv, r)) * prob.root[None, :, None]
    if not jacobian:
        return e, None
    B, m = r.shape[:2]
    J = np.empty((B, m, 2, prob.n_par))
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        J[..., :4] = -_unit_frechet_times(X, prob.tau, d0, d1)
        if prob.eq is None:
            J[..., 4:6] = F - np.eye(2)  # d r / d x* = -(I - F)
        if not white:
            J = _apply2(prob.Linv, J)
        J *= prob.root[None, :, None, None]
    return e, J


def _solve2(N: np.ndarray, g: np.ndarray) -> np.ndarray:
    """``N^{-1} g`` for (B, 2, 2) symmetric ``N`` and (B, 2, ...) ``g`` in closed form.

    A ridge of 1e-14 of the trace keeps an exactly singular ``N`` (``A = 0``) finite.
    """
    ridge = 1e-14 * (N[:, 0, 0] + N[:, 1, 1]) + 1e-300
    a = N[:, 0, 0] + ridge
    d = N[:, 1, 1] + ridge
    b = N[:, 0, 1]
    det = a * d - b * b
    ext = (slice(None),) + (None,) * (g.ndim - 2)
    a, b, d, det = a[ext], b[ext], d[ext], det[ext]
    g0, g1 = g[:, 0], g[:, 1]
    return np.stack([(d * g0 - b * g1) / det, (a * g1 - b * g0) / det], axis=1)


def _evaluate_projected(
    a: np.ndarray,
    prob: _Problem,
    jacobian: bool,
    Z: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """The one-step errors with the equilibrium eliminated (variable projection).

    The weighted error ``e = W_k (u1 - x* - F_k (u0 - x*)) = e0(A) + C(A) x*`` is
    affine in ``x*`` (``e0 = W_k (u1 - F_k u0)``, ``C = W_k (F_k - I)``), so for given
    ``A`` the best ``x*`` is a 2x2 least-squares solve, and Levenberg-Marquardt runs
    on ``A`` alone with the Jacobian projected off the columns of ``C`` (Kaufman's
    form of variable projection; Golub & Pereyra, *Inverse Problems* 19, 2003).
    Where ``A`` is nearly singular the equilibrium is barely determined and the full
    problem has a long flat valley along it (``x*`` runs off while the cost hardly
    changes), which the full Levenberg-Marquardt crawls along to its iteration cap;
    the projected problem has no such valley.

    Parameters
    ----------
    a : ndarray, shape (B, 4)
        ``A`` (internal units), row-major.
    prob : _Problem
        With ``eq`` None (the equilibrium is fitted).
    jacobian : bool
    Z : ndarray, shape (B, m, q), optional
        Instruments: the errors are replaced by the moments ``Z^T e`` (the
        nonlinear instrumental fit) before ``x*`` is eliminated.

    Returns
    -------
    e : ndarray, shape (B, m, 2) or (B, q, 2)
    J : ndarray, shape (B, m, 2, 4) or (B, q, 2, 4), or None
    xs : ndarray, shape (B, 2)
        The eliminated equilibrium.
    """
    B = a.shape[0]
    A = a.reshape(B, 2, 2)
    X = A[:, None] * prob.tau[None, :, None, None]
    white = _is_identity(prob.Linv)
    w = prob.root[None, :, None]
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        # expm(X) = f0 I + f1 (X - s I) from the coefficients the Jacobian needs too
        coef = _coefficients(X)
        sc, f0, f1 = coef[0], coef[3], coef[4]
        F = f1[..., None, None] * X
        F[..., 0, 0] += f0 - f1 * sc
        F[..., 1, 1] += f0 - f1 * sc
        u00, u01 = prob.u0[..., 0], prob.u0[..., 1]
        r0 = prob.u1 - np.stack(
            [F[..., 0, 0] * u00 + F[..., 0, 1] * u01, F[..., 1, 0] * u00 + F[..., 1, 1] * u01],
            axis=-1,
        )
        C = F - np.eye(2)  # (B, m, 2, 2): coefficient of x*
        if not white:
            r0 = _apply2(prob.Linv, r0)
            C = _apply2(prob.Linv, C)
        e0 = r0 * w
        C = C * w[..., None]
        if Z is not None:
            Zt = np.swapaxes(Z, 1, 2)
            q = Zt.shape[1]
            e0 = Zt @ e0
            C = (Zt @ C.reshape(B, -1, 4)).reshape(B, q, 2, 2)
        Cf = C.reshape(B, -1, 2)
        N = np.swapaxes(Cf, 1, 2) @ Cf
        xs = -_solve2(N, (np.swapaxes(Cf, 1, 2) @ e0.reshape(B, -1, 1))[..., 0])
        e = e0 + np.stack(
            [C[..., 0, 0] * xs[:, None, 0] + C[..., 0, 1] * xs[:, None, 1],
             C[..., 1, 0] * xs[:, None, 0] + C[..., 1, 1] * xs[:, None, 1]],
            axis=-1,
        )  # fmt: skip
    if not jacobian:
        return e, None, xs
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        J = -_unit_frechet_times(X, prob.tau, u00 - xs[:, None, 0], u01 - xs[:, None, 1], coef)
        if not white:
            J = _apply2(prob.Linv, J)
        J *= prob.root[None, :, None, None]
        if Z is not None:
            J = (Zt @ J.reshape(B, J.shape[1], 8)).reshape(B, q, 2, 4)
        Jf = J.reshape(B, -1, 4)
        # Kaufman's projection: J - C (C'C)^{-1} C' J
        J = (Jf - Cf @ _solve2(N, np.swapaxes(Cf, 1, 2) @ Jf)).reshape(J.shape)
    return e, J, xs


def solve_one_step(
    theta0: np.ndarray,
    prob: Any,
    evaluate: Callable[..., tuple],
    scale: np.ndarray,
    max_iter: int,
    xtol: float,
    ftol: float,
    time_budget: float | None,
    projected: Callable[..., tuple] | None = None,
    damping: float = 1e-3,
    settle: float = 0.0,
) -> Solution:
    """Levenberg-Marquardt on a one-step problem, the equilibrium eliminated when fitted.

    With ``prob.eq`` None and ``projected`` given, the solve runs on the four
    entries of ``A`` with ``projected`` (:func:`_evaluate_projected` or its
    instrumental form) and the returned ``theta`` is the full ``(A, x*)``; else on
    the full parameters with ``evaluate``.  ``damping`` and ``settle`` are passed to
    :func:`~fitdyn.estimators.lm.levenberg_marquardt`.
    """
    if projected is None or prob.eq is not None:
        return levenberg_marquardt(
            theta0, prob, evaluate, scale, max_iter, xtol, ftol,
            time_budget=time_budget, damping=damping, settle=settle,
        )  # fmt: skip
    sol = levenberg_marquardt(
        np.ascontiguousarray(theta0[:, :4]), prob, projected, scale, max_iter, xtol, ftol,
        time_budget=time_budget, damping=damping, settle=settle,
    )  # fmt: skip
    assert sol.aux is not None
    sol.theta = np.concatenate([sol.theta, sol.aux], axis=1)
    sol.aux = None
    return sol


#: predicted relative decrease of the cost at which a fit has converged: below
#: rounding, so the fits converge in the rounding zone (quadratically, by
#: Gauss-Newton steps) and a refit in a batch equals the fit alone to rounding
_FTOL = 1e-20


def _levenberg_marquardt(
    theta0: np.ndarray,
    prob: _Problem,
    max_iter: int,
    xtol: float,
    time_budget: float | None = None,
) -> Solution:
    """The shared batched core (:func:`fitdyn.estimators.lm.levenberg_marquardt`) on
    the weighted one-step errors of a :class:`_Problem`, ``x*`` eliminated when it is
    fitted (:func:`solve_one_step`).

    A cost below 1e-28 of the data's scale counts as exact zero; ``time_budget``
    (seconds) stops the rows still iterating, as not converged.
    """
    scale = np.sum(prob.u1 * prob.u1, axis=(1, 2)) * float(np.max(prob.root)) ** 2
    return solve_one_step(
        theta0, prob, _evaluate, scale, max_iter, xtol, _FTOL, time_budget, _evaluate_projected
    )


# ----------------------------------------------------------------------------------
# process noise by moments
# ----------------------------------------------------------------------------------
def process_noise_moments(A: np.ndarray, h: np.ndarray, r: np.ndarray, n_par: int) -> np.ndarray:
    """Diffusion ``Q`` from one-step errors, inverting ``Q -> sum_k W(h_k)`` exactly.

    ``E[sum_k r_k r_k^T] = sum_k W(h_k; Q)`` is linear in ``Q``; with the degrees of
    freedom corrected (``m / (m - n_par / 2)``) the moment equation is solved for
    the three entries of ``Q`` and the result clipped to positive semi-definite.
    ``W(h; Q) = integral_0^h expm(A s) Q expm(A s)^T ds`` solves ``W' = A W + W A^T``,
    a linear equation ``w' = L w`` in ``w = (w11, w12, w22)``, so ``W(h) =
    integral_0^h expm(L s) ds w(Q)``: the top-right block of one 6x6 exponential per
    step (Van Loan, *IEEE Trans. Autom. Control* 23, 1978), all steps in one batched
    :func:`scipy.linalg.expm`; ``sum_k W(h_k)`` is then a 3x3 matrix applied to ``Q``.

    Parameters
    ----------
    A : ndarray, shape (2, 2)
    h : ndarray, shape (m,)
    r : ndarray, shape (m, 2)
        One-step errors ``x_{k+1} - x* - expm(A h_k) (x_k - x*)``.
    n_par : int
        Fitted parameters (6, or 4 with a known equilibrium).

    Returns
    -------
    ndarray, shape (2, 2)
    """
    from scipy.linalg import expm

    from fitdyn.bootstrap import _psd

    m = r.shape[0]
    S = r.T @ r * (m / max(m - n_par / 2.0, 1.0))
    (a, b), (c, d) = np.asarray(A, dtype=float)
    M = np.zeros((6, 6))
    M[:3, :3] = [[2.0 * a, 2.0 * b, 0.0], [c, a + d, b], [0.0, 2.0 * c, 2.0 * d]]
    M[:3, 3:] = np.eye(3)
    with np.errstate(over="ignore", invalid="ignore"):
        K = expm(M[None] * np.asarray(h, dtype=float)[:, None, None])[:, :3, 3:].sum(axis=0)
    if not np.all(np.isfinite(K)):
        raise np.linalg.LinAlgError("the step covariances overflow")
    q = np.linalg.solve(K, [S[0, 0], S[0, 1], S[1, 1]])
    return _psd(np.array([[q[0], q[1]], [q[1], q[2]]]))


def _check_budget(time_budget: Any) -> float | None:
    """A positive number of seconds, or ``None`` (no limit)."""
    if time_budget is None:
        return None
    try:
        sec = float(time_budget)
    except (TypeError, ValueError):
        sec = float("nan")
    if not (np.isfinite(sec) and sec > 0):
        raise EstimationError(
            f"time_budget must be a positive number of seconds or None, got {time_budget!r}"
        )
    return sec


# ----------------------------------------------------------------------------------
# the estimator
# ----------------------------------------------------------------------------------
class PredictionEstimator(NonlinearEstimator):
    """One-step prediction-error fit for observed states with process noise.

    Parameters
    ----------
    weighting : {"step", "noise"}
        ``"step"`` (default): one pass, channels weighted by their spreads;
        ``"noise"``: a second pass weighted by the inverse covariance of the first
        pass's standardised errors.  Both weight each pair by ``1 / h_k``.
    frequencies : sequence of float
        Factors applied to an oscillatory start's frequency for extra starts of the
        point fit (default ``(0.5, 2.0)``; empty for none).
    max_iterations : int
        Levenberg-Marquardt iteration cap per pass (default 100).
    xtol : float
        Relative step size at which an iteration counts as converged (default 1e-10).
    time_budget : float or None
        Wall-clock seconds for the point fit (default 30; ``None`` for no limit), and
        as many for all the bootstrap refits of that point fit (their chunks share
        one budget); rows still iterating when it is spent stop as not converged,
        and once it is spent the remaining replicates fail at once ("time budget
        spent").

    Notes
    -----
    ``extra`` holds ``process_noise`` (``Q``), ``measurement_cov`` (zeros: the model
    has none), ``step_range`` (shortest, longest step), ``iterations``,
    ``objective`` (the final weighted sum of squares), ``converged`` and
    ``starts`` (the objective reached from each start).  ``param_cov`` is the
    Gauss-Newton sandwich covariance mapped to ``(a11, a12, a21, a22, b1, b2)``.
    """

    name: ClassVar[str] = "prediction"
    needs_uniform_steps: ClassVar[bool] = False

    def __init__(
        self,
        weighting: str = "step",
        frequencies: Any = (0.5, 2.0),
        max_iterations: int = 100,
        xtol: float = 1e-10,
        time_budget: float | None = 30.0,
        **unknown: Any,
    ) -> None:
        reject_unknown(
            self.name,
            unknown,
            ("weighting", "frequencies", "max_iterations", "xtol", "time_budget"),
        )
        if weighting not in ("noise", "step"):
            raise EstimationError(f"weighting must be 'noise' or 'step', got {weighting!r}")
        freqs = tuple(float(f) for f in frequencies)
        if any(not np.isfinite(f) or f <= 0 for f in freqs):
            raise EstimationError(f"frequencies must be positive factors, got {list(freqs)}")
        iters = int(max_iterations)
        if iters < 1 or iters != max_iterations:
            raise EstimationError(
                f"max_iterations must be a positive integer, got {max_iterations!r}"
            )
        tol = float(xtol)
        if not (np.isfinite(tol) and 0 < tol < 1):
            raise EstimationError(f"xtol must be a number in (0, 1), got {xtol!r}")
        budget = _check_budget(time_budget)
        super().__init__(
            weighting=weighting,
            frequencies=freqs,
            max_iterations=iters,
            xtol=tol,
            time_budget=budget,
        )
        self._reference: dict[str, Any] | None = None
        #: the budget the running solves draw on (set by fit and fit_values)
        self._budget: TimeBudget = TimeBudget(None)
        #: replicates of the last :meth:`fit_values` call, failed ones, and the
        #: replicates skipped because the time budget was spent (by reason)
        self.last_failures: dict[str, Any] = {}

    # -- units -----------------------------------------------------------------------------
    @staticmethod
    def _units(V: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """Channel centres and spreads per replicate (B, 2) and the time scale.

        A replicate whose values overflow (simulated from an explosive model) gets
        non-finite units; its fit then fails and is counted, without warnings.
        """
        with np.errstate(over="ignore", invalid="ignore"):
            mu = V.mean(axis=1)
            sd = V.std(axis=1)
            sd = np.where(sd > 0, sd, np.maximum(np.abs(mu), 1.0))
        return mu, sd, float(np.median(h))

    @staticmethod
    def _to_internal(A, xs, mu, sd, T):
        with np.errstate(over="ignore", invalid="ignore"):
            A_i = T * A * sd[:, None, :] / sd[:, :, None]
            xs_i = (xs - mu) / sd
        return A_i, xs_i

    @staticmethod
    def _to_original(A_i, xs_i, mu, sd, T):
        with np.errstate(over="ignore", invalid="ignore"):
            A = A_i * sd[:, :, None] / sd[:, None, :] / T
            xs = mu + sd * xs_i
        return A, xs

    # -- starts ------------------------------------------------------------------------------
    def _starts(
        self,
        rec: Recording,
        V: np.ndarray,
        eq: np.ndarray | None,
        first: np.ndarray,
        h: np.ndarray,
    ) -> list[tuple[str, np.ndarray, np.ndarray]]:
        """Starting ``(label, A (B, 2, 2), x* (B, 2))`` in original units."""
        from fitdyn.estimators.base import lstsq
        from fitdyn.estimators.integral import IntegralEstimator

        B = V.shape[0]
        x0 = V[:, first]
        x1 = V[:, first + 1]
        base: list[tuple[str, np.ndarray, np.ndarray]] = []
        # first-order (Euler) regression: the small-step form of the objective
        if eq is None:
            C, c = lstsq(x0, (x1 - x0) / h[:, None], np.zeros(first.size, dtype=int), h)
            A = np.swapaxes(C, 1, 2)
            b = c[:, 0, :]
        else:
            C, _ = lstsq(x0 - eq, (x1 - x0) / h[:, None], None, h)
            A = np.swapaxes(C, 1, 2)
            b = -A @ eq
        base.append(("first-order", A, b))
        try:
            s = IntegralEstimator().fit_values(rec, V, eq)
        except FitdynError:
            pass
        else:
            base.append(("integral", s.matrix, s.offset))
        out: list[tuple[str, np.ndarray, np.ndarray]] = []
        centre = V.mean(axis=1)
        for label, A, b in base:
            A = np.where(np.isfinite(A), A, 0.0)
            if eq is not None:
                xs = np.broadcast_to(eq, (B, 2)).copy()
            else:
                xs = equilibrium_from(A, np.where(np.isfinite(b), b, 0.0))
                xs = np.where(np.isfinite(xs), xs, centre)
            out.append((label, A, xs))
            tr, _, disc = linalg2.invariants(A)
            if np.any(disc < 0):
                M = A - 0.5 * tr[:, None, None] * np.eye(2)
                for f in self.settings["frequencies"]:
                    Af = np.where((disc < 0)[:, None, None], 0.5 * tr[:, None, None] * np.eye(2)
                                  + f * M, A)  # fmt: skip
                    out.append((f"{label}, frequency x{f:g}", Af, xs))
        return out

    # -- the batched solve --------------------------------------------------------------------
    def _solve_chunk(
        self,
        V: np.ndarray,
        eq: np.ndarray | None,
        first: np.ndarray,
        h: np.ndarray,
        starts: list[tuple[str, np.ndarray, np.ndarray]],
    ) -> dict[str, Any]:
        """Both passes for replicates ``V`` (B, n, 2) from every start; the best wins."""
        B = V.shape[0]
        S = len(starts)
        mu, sd, T = self._units(V, h)
        tau = h / T
        root = 1.0 / np.sqrt(tau)
        U = (V - mu[:, None, :]) / sd[:, None, :]
        eq_i = None if eq is None else (eq[None, :] - mu) / sd
        # replicate b, start j -> row j * B + b
        rep = np.tile(np.arange(B), S)
        prob = _Problem(
            u0=U[rep][:, first],
            u1=U[rep][:, first + 1],
            tau=tau,
            root=root,
            eq=None if eq_i is None else eq_i[rep],
            Linv=np.broadcast_to(np.eye(2), (B * S, 2, 2)).copy(),
        )
        thetas = []
        for _, A, xs in starts:
            A_i, xs_i = self._to_internal(A, xs, mu, sd, T)
            th = A_i.reshape(B, 4)
            if eq is None:
                th = np.concatenate([th, xs_i], axis=1)
            thetas.append(th)
        theta0 = np.concatenate(thetas, axis=0)
        max_iter = self.settings["max_iterations"]
        xtol = self.settings["xtol"]
        sol = _levenberg_marquardt(theta0, prob, max_iter, xtol, time_budget=self._budget.left())
        cost_by_start = np.where(sol.converged, sol.cost, np.inf).reshape(S, B)
        cost_by_start = np.where(np.isfinite(cost_by_start), cost_by_start, np.inf)
        best = np.argmin(cost_by_start, axis=0)  # (B,)
        pick = best * B + np.arange(B)
        theta = sol.theta[pick]
        converged = sol.converged[pick]
        iterations = sol.iterations.reshape(S, B).sum(axis=0)
        cost = sol.cost[pick]
        Linv = np.broadcast_to(np.eye(2), (B, 2, 2)).copy()
        prob1 = prob.take(pick)
        if self.settings["weighting"] == "noise":
            e, _ = _evaluate(theta, prob1, False)
            m = first.size
            P = prob1.n_par
            Sig = np.einsum("bki,bkj->bij", e, e) / max(m - P / 2.0, 1.0)
            # rounding-level errors (noise-free data) carry no weighting information
            floor = 1e-20 * float(np.mean(root * root))
            with np.errstate(invalid="ignore"):
                ok = (
                    np.all(np.isfinite(Sig), axis=(1, 2))
                    & (np.linalg.det(Sig) > 0)
                    & (np.trace(Sig, axis1=1, axis2=2) > floor)
                )
            Sig = np.where(ok[:, None, None], Sig, np.eye(2))
            Lc = np.linalg.cholesky(Sig)
            Linv = linalg2.inv(Lc)
            prob2 = _Problem(u0=prob1.u0, u1=prob1.u1, tau=tau, root=root, eq=prob1.eq, Linv=Linv)
            sol2 = _levenberg_marquardt(
                theta, prob2, max_iter, xtol, time_budget=self._budget.left()
            )
            converged = converged & sol2.converged
            theta = sol2.theta
            cost = sol2.cost
            iterations = iterations + sol2.iterations
            prob1 = prob2
        A_i, xs_i = _unpack(theta, prob1)
        A, xs = self._to_original(A_i, xs_i, mu, sd, T)
        return {
            "A": A,
            "xs": xs,
            "theta": theta,
            "cost": cost,
            "converged": converged,
            "iterations": iterations,
            "best": best,
            "cost_by_start": cost_by_start,
            "prob": prob1,
            "units": (mu, sd, T),
        }

    def _pairs(self, rec: Recording) -> tuple[np.ndarray, np.ndarray]:
        """The pairs of consecutive samples this fit uses (:func:`step_pairs`)."""
        return step_pairs(rec, self.name)

    def _chunk(self, m: int, starts: int) -> int:
        return int(max(1, _CHUNK_BYTES // max(m * starts * _BYTES_PER_PAIR, 1)))

    # -- protocol -----------------------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Prediction-error point estimate (see the module notes).

        Raises
        ------
        TooFewSamplesError
            Fewer than four pairs of consecutive samples within segments.
        EstimationError
            When no start leads to a finite fit.
        """
        eq = check_equilibrium(equilibrium)
        first, h = step_pairs(rec, self.name)
        V = np.asarray(rec.values, dtype=float)[None]
        starts = self._starts(rec, V, eq, first, h)
        self._budget = TimeBudget(self.settings["time_budget"])
        sol = self._solve_chunk(V, eq, first, h, starts)
        A = sol["A"][0]
        xs = sol["xs"][0]
        if not (np.all(np.isfinite(A)) and np.all(np.isfinite(xs)) and np.isfinite(sol["cost"][0])):
            raise EstimationError(
                "the prediction-error fit found no finite solution from any start; the "
                "data may not follow dx/dt = A (x - x*); try the 'integral' estimator",
                source=rec.source,
            )
        b = -A @ xs
        m = first.size
        n_par = 6 if eq is None else 4
        F = linalg2.expm(A, h)
        r = V[0, first + 1] - xs - np.einsum("kij,kj->ki", F, V[0, first] - xs)
        resid = r / np.sqrt(h)[:, None]
        dof = max(m - n_par / 2.0, 1.0)
        rcov = resid.T @ resid / dof
        notes: list[str] = [
            f"one-step prediction-error fit over {m} pairs of consecutive samples within "
            f"segments, steps {h.min():.4g} to {h.max():.4g}; errors weighted by 1 / h_k",
        ]
        warns: list[str] = []
        try:
            Q = process_noise_moments(A, h, r, n_par)
            notes.append(
                "process noise Q by moments of the one-step errors (exact step "
                f"covariances): {np.round(Q, 6).tolist()}"
            )
        except (FitdynError, np.linalg.LinAlgError):
            from fitdyn.bootstrap import _psd

            Q = _psd(rcov)
            notes.append("process noise Q from the standardised errors (small-step form)")
        conv = bool(sol["converged"][0])
        iters = int(sol["iterations"][0])
        labels = [lab for lab, _, _ in starts]
        costs = sol["cost_by_start"][:, 0]
        notes.append(
            f"Levenberg-Marquardt, {iters} iteration(s) over {len(starts)} start(s); best "
            f"start: {labels[int(sol['best'][0])]}; objective {float(sol['cost'][0]):.6g}"
        )
        notes.append(
            "weighting: "
            + (
                "second pass by the inverse covariance of the standardised errors"
                if self.settings["weighting"] == "noise"
                else "channels by their spreads (one pass)"
            )
        )
        if eq is not None:
            notes.append("equilibrium given, not fitted")
        if not conv:
            warns.append(
                f"the prediction-error fit did not converge within "
                f"{self.settings['max_iterations']} iterations per pass or the time budget; "
                "the estimate may be inaccurate (raise max_iterations or time_budget, or "
                "check the data)"
            )
        lam = linalg2.eigvals(A)
        wmax = float(np.max(np.abs(lam.imag)))
        over = int(np.sum(wmax * h > ALIASING_LIMIT))
        if over:
            warns.append(
                f"aliasing risk: {over} of {m} steps have |Im lambda| * h above pi/2 (longest "
                f"{wmax * h.max():.3g}); only the shorter steps pin the frequency down; "
                "sample more finely"
            )
        ratio = float(h.max() / h.min())
        if ratio > STEP_RATIO_LIMIT:
            warns.append(
                f"the steps span a factor {ratio:.3g} (shortest {h.min():.3g}, longest "
                f"{h.max():.3g}); the weights 1 / h_k differ as much, and any measurement "
                "noise or time rounding dominates the shortest steps"
            )
        cov6, cov_warn = self._covariance(sol, m)
        if cov_warn:
            warns.append(cov_warn)
        eq_out: np.ndarray | None
        if eq is not None:
            eq_out = eq
        else:
            e_ = equilibrium_from(A[None], b[None])[0]
            eq_out = None if np.any(np.isnan(e_)) else xs
        self._reference = {
            "times": np.asarray(rec.times, dtype=float).copy(),
            "segment": np.asarray(rec.segment).copy(),
            "eq": None if eq is None else eq.copy(),
            "A": A.copy(),
            "xs": xs.copy(),
            # one budget for all refits of this point fit, however the caller chunks
            "budget": None,
        }
        extra = {
            "process_noise": Q,
            "measurement_cov": np.zeros((2, 2)),
            "step_range": (float(h.min()), float(h.max())),
            "iterations": iters,
            "objective": float(sol["cost"][0]),
            "converged": conv,
            "starts": [
                {"start": lab, "objective": float(c)} for lab, c in zip(labels, costs, strict=True)
            ],
        }
        settings = dict(self.settings)
        settings["frequencies"] = list(settings["frequencies"])
        return Estimate(
            method=self.name,
            matrix=A,
            offset=b,
            equilibrium=eq_out,
            equilibrium_known=eq is not None,
            residuals=resid,
            residual_cov=rcov,
            n_used=m,
            settings=settings,
            param_cov=cov6,
            notes=tuple(notes),
            warnings=tuple(warns),
            extra=extra,
        )

    def _covariance(self, sol: dict[str, Any], m: int) -> tuple[np.ndarray | None, str]:
        """Gauss-Newton sandwich covariance of (a11, a12, a21, a22, b1, b2)."""
        prob: _Problem = sol["prob"]
        theta = sol["theta"][:1]
        e, J = _evaluate(theta, prob.take(np.array([0])), True)
        assert J is not None
        P = prob.n_par
        Jk = J[0]  # (m, 2, P)
        Jf = Jk.reshape(-1, P)
        JtJ = Jf.T @ Jf
        if not np.all(np.isfinite(JtJ)):
            return None, "no asymptotic covariance (non-finite Jacobian); use the bootstrap"
        sv = np.linalg.svd(Jf, compute_uv=False)
        if sv[0] <= 0 or sv[-1] / sv[0] < 1e-7:
            return None, (
                "the prediction-error fit leaves a combination of parameters unidentified "
                "(near-zero singular value of the Jacobian); no asymptotic covariance, "
                "use the bootstrap or more varied data"
            )
        Sig = e[0].T @ e[0] / max(m - P / 2.0, 1.0)
        meat = np.einsum("kip,ij,kjq->pq", Jk, Sig, Jk)
        bread = np.linalg.inv(JtJ)
        return self._six_covariance(bread @ meat @ bread, sol), ""

    def _six_covariance(self, C: np.ndarray, sol: dict[str, Any]) -> np.ndarray:
        """Map a covariance of the internal parameters of replicate 0 of ``sol`` to
        ``(a11, a12, a21, a22, b1, b2)`` in original units."""
        prob = sol["prob"]
        theta = sol["theta"][:1]
        P = theta.shape[1]
        mu_b, sd_b, T = sol["units"]
        mu, sd = mu_b[0], sd_b[0]
        eq_i = None if prob.eq is None else prob.eq[0]

        def six(th: np.ndarray) -> np.ndarray:
            A_i = th[:4].reshape(1, 2, 2)
            xs_i = (th[4:6] if eq_i is None else eq_i)[None]
            A, xs = self._to_original(A_i, xs_i, mu[None], sd[None], T)
            return np.concatenate([A[0].ravel(), -A[0] @ xs[0]])

        th0 = theta[0]
        Jm = np.empty((6, P))
        for k in range(P):  # the map is bilinear: central differences are exact
            d = 1e-3 * max(1.0, abs(th0[k]))
            tp, tm = th0.copy(), th0.copy()
            tp[k] += d
            tm[k] -= d
            Jm[:, k] = (six(tp) - six(tm)) / (2 * d)
        cov = Jm @ C @ Jm.T
        return 0.5 * (cov + cov.T)

    def fit_values(
        self, rec: Recording, values: np.ndarray, equilibrium: np.ndarray | None = None
    ) -> SystemBatch:
        """Refit replicate values (B, n, 2) sharing ``rec``'s sampling, in one batched solve.

        Each replicate starts from the point estimate of :meth:`fit` when that ran on
        the same times, segments and equilibrium setting (otherwise from the point
        fit's own starts); replicates are processed in chunks of bounded memory.
        Replicates that do not converge or are not finite are returned with ``valid =
        False`` (never redrawn).  The refits of one point fit share one ``time_budget``
        across calls; once it is spent, the remaining replicates fail at once
        (:attr:`last_failures` counts them).
        """
        eq = check_equilibrium(equilibrium)
        V, _ = replicate_values(rec, values)
        first, h = self._pairs(rec)
        B = V.shape[0]
        ref = self._reference
        use_ref = (
            ref is not None
            and ref["times"].shape == rec.times.shape
            and np.array_equal(ref["times"], rec.times)
            and np.array_equal(ref["segment"], rec.segment)
            and ((ref["eq"] is None) == (eq is None))
            and (eq is None or np.array_equal(ref["eq"], eq))
        )
        mats = np.full((B, 2, 2), np.nan)
        offs = np.full((B, 2), np.nan)
        valid = np.zeros(B, dtype=bool)
        if use_ref:
            assert ref is not None
            if ref.get("budget") is None:
                ref["budget"] = TimeBudget(self.settings["time_budget"])
            self._budget = ref["budget"]
        else:
            self._budget = TimeBudget(self.settings["time_budget"])
        skipped = 0
        n_starts = 1 if use_ref else 2 * (1 + len(self.settings["frequencies"]))
        size = self._chunk(first.size, n_starts)
        for lo in range(0, B, size):
            hi = min(B, lo + size)
            if self._budget.left() == 0.0:
                # the budget is spent: the rest fail without a first evaluation
                skipped = B - lo
                break
            Vc = V[lo:hi]
            if use_ref:
                assert ref is not None
                k = hi - lo
                starts = [
                    (
                        "point estimate",
                        np.broadcast_to(ref["A"], (k, 2, 2)).copy(),
                        np.broadcast_to(ref["xs"] if eq is None else eq, (k, 2)).copy(),
                    )
                ]
            else:
                starts = self._starts(rec, Vc, eq, first, h)
            sol = self._solve_chunk(Vc, eq, first, h, starts)
            A, xs = sol["A"], sol["xs"]
            b = -np.einsum("bij,bj->bi", A, xs)
            ok = (
                sol["converged"]
                & np.all(np.isfinite(A), axis=(1, 2))
                & np.all(np.isfinite(b), axis=1)
            )
            mats[lo:hi] = np.where(ok[:, None, None], A, np.nan)
            offs[lo:hi] = np.where(ok[:, None], b, np.nan)
            valid[lo:hi] = ok
        reasons = {STATUS[2]: skipped} if skipped else {}
        self.last_failures = {
            "replicates": B,
            "failed": int(B - valid.sum()),
            "reasons": reasons,
        }
        return SystemBatch(matrix=mats, offset=offs, valid=valid)
