"""Output-error fit: the solution of the linear model fitted to the samples.

The model of trajectory ``r`` (first sample at ``t0_r``) is

    x(t) = x* + expm(A (t - t0_r)) (x0_r - x*),

with ``A`` and the equilibrium ``x*`` shared by all trajectories and one starting
state ``x0_r`` per trajectory (per trajectory, not per segment: the solution runs
through gaps, so gaps need no special care, and irregular times are natural).  The
parameters minimise the weighted squared differences between the samples and the
model by nonlinear least squares.  Under independent Gaussian measurement noise
with known per-channel variances this is the maximum-likelihood estimate (Ljung,
*System Identification*, 2nd ed., 1999, output-error models; Bard, *Nonlinear
Parameter Estimation*, 1974).  It ignores process noise: with strong process noise
the residuals are autocorrelated and the fit says so in its warnings.

The solver
----------
The batched Levenberg-Marquardt core of :mod:`fitdyn.estimators.lm`, with the
Jacobian in closed form: ``d x(t) / d A`` is the Frechet derivative of the 2x2
exponential ``expm(A tau)`` in the direction ``tau E_c`` for every sample time
``tau`` (:func:`fitdyn.estimators.prediction.frechet_expm`'s formula applied to the
four unit directions), ``d x / d x*`` is ``I - expm(A tau)`` and ``d x / d x0_r`` is
``expm(A tau)`` on the samples of trajectory ``r``; with the offset parameterisation
the derivative of ``tau phi1(A tau) b`` comes from :func:`fitdyn.linalg2.phi1_frechet`.
Every start of the point fit, and every bootstrap replicate of
:meth:`TrajectoryEstimator.fit_values`, is one row of the same batched solve (in
chunks of bounded memory); the point fit is the one-replicate case.  Each solve has
an iteration cap (``max_iterations`` per weighting round) and a wall-clock budget
(``time_budget`` seconds for the point fit, and as many for all the bootstrap refits of
that point fit together, however many calls they are chunked into); a replicate that
does not converge within them is returned as not valid and counted by the bootstrap as
a failed fit, never redrawn
(``extra["did_not_converge"]`` and :attr:`TrajectoryEstimator.last_failures` give the
counts).

lmfit is not used here: the loop of lmfit fits the batched solve replaced, one
replicate at a time, was 44 to 60 times slower on 1,000 bootstrap replicates of a
200-sample recording (``benchmarks/trajectory_speed.py``, which keeps it as its
reference) and could not share its work across replicates; it was then kept to lay
out the point fit's parameter report, but importing it took over a second in every
new process (longer than the fit), so ``extra["parameter_report"]`` (values,
standard errors, large correlations) is now written here.

Details
-------
* The problem is solved in internal units: each channel centred and divided by its
  standard deviation, times divided by the longest trajectory span.  The result is
  mapped back exactly, so rescaling a channel or shifting time changes nothing.
  Bootstrap replicates use the point fit's units.
* Weights are per channel: by default ``1 / sd`` of each channel's residuals, the
  fit repeated until the weights settle (the fixed point is the maximum-likelihood
  estimate with unknown per-channel noise variances); ``weights=(w1, w2)`` fixes
  them; ``noise_sd=(s1, s2)`` fixes them to ``1 / s`` and declares the noise known
  (the covariance is then not scaled by the reduced chi-square).
* Starting values come from the integral estimator (its fitted segment starting
  states give ``x0_r``); for oscillatory starts (complex eigenvalues) extra starts
  scale the frequency ``|Im lambda|`` by ``frequencies``, because the output-error
  cost has local minima at other frequencies.  All starts are refined together
  and the lowest cost wins.
* The solve is by variable projection (Golub & Pereyra, *SIAM J. Numer. Anal.* 10,
  1973): for each ``A`` the starting states and ``x*`` (or ``b``) are solved by
  linear least squares inside the residual, so Levenberg-Marquardt iterates on the
  four entries of ``A`` only (Kaufman's Jacobian); the reduced problem converges in
  a few iterations where the full one crawls along the valley of nearly collinear
  starting states and equilibrium of a diverging trajectory.  The linear design
  is dense in the trajectories (its size grows as samples x trajectories).
* When the starting ``A`` is (nearly) singular the equilibrium is not defined, so
  the model is parameterised by ``b`` (``x(t) = expm(A tau) x0 + int_0^tau expm(A s)
  ds b``, the integral by :func:`fitdyn.linalg2.expm_integral`) instead of ``x*``.
* The covariance of ``(a11, a12, a21, a22, b1, b2)`` is the Gauss-Newton one
  (the inverse of ``J'J``, scaled by the reduced chi-square unless the noise is
  known) mapped by the delta method (``b = -A x*``).  When it is singular or
  unavailable the unidentified parameters (right singular vectors of the Jacobian
  with negligible singular values) are named in the warnings and ``param_cov`` is
  ``None``; the fit never fails for that reason.
* Diverging trajectories (saddles, unstable nodes) make trial steps overflow; such
  steps are rejected like any step that does not lower the cost, and the iteration
  cap bounds the effort.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import EstimationError, FitdynError, TooFewSamplesError
from fitdyn.estimators.auto import residual_lag1
from fitdyn.estimators.base import Estimate, NonlinearEstimator, SystemBatch
from fitdyn.estimators.derivative import check_equilibrium, reject_unknown, replicate_values
from fitdyn.estimators.lm import STATUS, Normal, Solution, levenberg_marquardt
from fitdyn.recording import Recording

__all__ = ["TrajectoryEstimator"]

_SINGULAR = 1e-3  # |det A| <= this * max|lambda|^2 (internal units): parameterise by b
_REWEIGHT_ROUNDS = 8  # at most this many weighted fits while the weights settle
_REWEIGHT_CHANGE = 1e-4  # relative weight change at which the weights have settled
#: relative precision of the cost at which a fit has converged (the parameters are then
#: within about sqrt(2 n * _FTOL) standard errors of the minimum: 3e-4 for 200 samples)
_FTOL = 1e-10
#: predicted relative decrease below which a fit that no step improves has converged
#: (the residuals of a fast diverging trajectory lose digits to its growth)
_STALL = 1e-7
#: iterations of the search's first round: starts not converged by then continue
#: unless their cost exceeds _ABANDON times the best converged start's (common
#: practice, no source; on 460 records of the accuracy and coverage benchmarks 7
#: starts were abandoned, none of which was the best when run to the cap)
_SEARCH_ROUND = 20
_ABANDON = 4.0
#: memory budget (bytes) of one batched chunk (about 100 replicates of 200 samples: small
#: enough for the (replicates x samples) arrays to stay in cache, fastest in our runs)
_CHUNK_BYTES = 16 * 2**20
#: largest factor (internal units) by which the model may amplify the rounding of its
#: parameters: beyond it the rounding error of the model exceeds about 2e-4 of a
#: channel's spread (machine epsilon 2.2e-16 times 1e12), so the fit matches the data
#: only by cancelling digits double precision does not hold
_MAX_AMPLIFICATION = 1e12
#: the projected Jacobian's J'J is formed from the unprojected one unless the
#: projection leaves less than this fraction of its trace (digits cancel)
_CANCEL = 1e-8
#: failure reason of a replicate whose model amplifies rounding beyond that
_WILD = "model beyond double precision"
#: failure reason of every replicate of a point fit that did not converge
_UNCONVERGED = "the point fit did not converge"


@dataclass
class _Problem:
    """Data of one output-error problem in internal units."""

    tau: np.ndarray  # (n,) time since the trajectory's first sample, internal units
    traj: np.ndarray  # (n,) trajectory index
    y: np.ndarray  # (n, 2) scaled samples
    n_traj: int
    mu: np.ndarray  # (2,) channel centres
    sd: np.ndarray  # (2,) channel scales
    T: float  # time scale
    eq: np.ndarray | None  # known equilibrium, internal units

    def to_internal_A(self, A: np.ndarray) -> np.ndarray:
        return self.T * (A * self.sd[None, :]) / self.sd[:, None]

    def to_original_A(self, A: np.ndarray) -> np.ndarray:
        return (A * self.sd[:, None]) / self.sd[None, :] / self.T


@dataclass
class _Batch:
    """A batch of output-error problems sharing the sampling and the units.

    Row ``b`` has its own samples ``y[b]`` and channel weights ``w[b]``.
    """

    tau: np.ndarray  # (n,)
    traj: np.ndarray  # (n,)
    y: np.ndarray  # (B, n, 2)
    w: np.ndarray  # (B, 2)
    n_traj: int
    kind: str  # "equilibrium", "offset" or "known"
    eq: np.ndarray | None  # (2,) known equilibrium, internal units

    @property
    def n_par(self) -> int:
        return 4 + (0 if self.kind == "known" else 2) + 2 * self.n_traj

    def take(self, idx: np.ndarray) -> _Batch:
        return replace(self, y=self.y[idx], w=self.w[idx])

    def scale(self) -> np.ndarray:
        """Size of a cost that counts as exact zero, times 1e28."""
        return np.sum((self.y * self.w[:, None, :]) ** 2, axis=(1, 2)) + 1e-300


def _batch(prob: _Problem, kind: str, y: np.ndarray, w: np.ndarray) -> _Batch:
    y = np.asarray(y, dtype=float)
    if y.ndim == 2:
        y = y[None]
    w = np.broadcast_to(np.asarray(w, dtype=float), (y.shape[0], 2)).copy()
    return _Batch(tau=prob.tau, traj=prob.traj, y=y, w=w, n_traj=prob.n_traj, kind=kind, eq=prob.eq)


def _names(n_traj: int, kind: str) -> list[str]:
    v = ["xs1", "xs2"] if kind == "equilibrium" else (["b1", "b2"] if kind == "offset" else [])
    x0 = [f"x0_{r + 1}_{j}" for r in range(n_traj) for j in (1, 2)]
    return ["a11", "a12", "a21", "a22", *v, *x0]


def _split(theta: np.ndarray, prob: _Problem, kind: str):
    A = theta[:4].reshape(2, 2)
    if kind == "known":
        v = prob.eq
        x0 = theta[4:].reshape(prob.n_traj, 2)
    else:
        v = theta[4:6]
        x0 = theta[6:].reshape(prob.n_traj, 2)
    return A, v, x0


def _mv(F: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``F[..., :, :] @ v[..., :]`` for 2x2 ``F`` in elementwise arithmetic."""
    v0, v1 = v[..., 0], v[..., 1]
    return np.stack([F[..., 0, 0] * v0 + F[..., 0, 1] * v1, F[..., 1, 0] * v0 + F[..., 1, 1] * v1],
                    axis=-1)  # fmt: skip


def _unit_directions(
    X: np.ndarray,
    tau: np.ndarray,
    d: np.ndarray,
    parts: tuple[np.ndarray, ...],
) -> np.ndarray:
    """``D f(X)[tau E_c] d`` for the four unit directions ``E_11, E_12, E_21, E_22``.

    ``f(X) = f0 I + f1 M`` with ``f0``, ``f1`` functions of ``s`` and ``q``; ``parts``
    is ``(h, f0_s, f0_q, f1, f1_s, f1_q)``, so that in direction ``E`` the derivative
    is ``(f0_s ds + f0_q dq) I + (f1_s ds + f1_q dq) M + f1 dM`` (the formula of
    :func:`fitdyn.estimators.prediction.frechet_expm` and
    :func:`fitdyn.linalg2.phi1_frechet`), applied to the vectors ``d``.

    Returns
    -------
    ndarray, shape (B, n, 2, 4)
        ``[..., i, c]``: component ``i`` for direction ``c``.
    """
    h, f0s, f0q, f1, f1s, f1q = parts
    t = np.broadcast_to(tau, h.shape)
    x01, x10 = X[..., 0, 1], X[..., 1, 0]
    d0, d1 = d[..., 0], d[..., 1]
    Md0 = h * d0 + x01 * d1
    Md1 = x10 * d0 - h * d1
    out = np.empty((*h.shape, 2, 4))
    ds = 0.5 * t
    for c, sign in ((0, 1.0), (3, -1.0)):
        dq = sign * h * t
        alpha = f0s * ds + f0q * dq
        beta = f1s * ds + f1q * dq
        out[..., 0, c] = alpha * d0 + beta * Md0 + f1 * sign * ds * d0
        out[..., 1, c] = alpha * d1 + beta * Md1 - f1 * sign * ds * d1
    for c, xq in ((1, x10), (2, x01)):
        dq = xq * t
        alpha = f0q * dq
        beta = f1q * dq
        out[..., 0, c] = alpha * d0 + beta * Md0 + (f1 * t * d1 if c == 1 else 0.0)
        out[..., 1, c] = alpha * d1 + beta * Md1 + (f1 * t * d0 if c == 2 else 0.0)
    return out


def _exponentials(a: np.ndarray, bt: _Batch) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """``X = A tau`` (B, n, 2, 2), ``expm(X)`` and (offset kind) ``tau phi1(X)``."""
    B = a.shape[0]
    X = a.reshape(B, 2, 2)[:, None] * bt.tau[None, :, None, None]
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        F = linalg2.expm(X)
        G = linalg2.phi1(X) * bt.tau[None, :, None, None] if bt.kind == "offset" else None
    return X, F, G


def _expm_directions(
    X: np.ndarray,
    tau: np.ndarray,
    d: np.ndarray,
    Fd: np.ndarray,
    parts: tuple[np.ndarray, ...],
) -> np.ndarray:
    """``L(X, tau E_c) d`` for the four unit directions: :func:`_unit_directions` for the
    exponential, with its terms shared.

    With ``f0_s = f0``, ``f0_q = f1 / 2``, ``f1_s = f1`` and ``f1_q = g`` the
    derivative in direction ``tau E_c`` applied to ``d`` is ``tau / 2 F d + tau h K
    + f1 dM d`` (diagonal directions) or ``tau x_ji K + f1 dM d`` (off-diagonal
    ones) with ``K = f1 / 2 d + g M d``; ``Fd`` is ``expm(X) d``.  ``parts`` is
    ``(h, f1, g)``.

    Returns
    -------
    ndarray, shape (B, n, 2, 4)
    """
    h, f1, g = parts
    t = np.broadcast_to(tau, h.shape)
    x01, x10 = X[..., 0, 1], X[..., 1, 0]
    d0, d1 = d[..., 0], d[..., 1]
    tK0 = t * (0.5 * f1 * d0 + g * (h * d0 + x01 * d1))
    tK1 = t * (0.5 * f1 * d1 + g * (x10 * d0 - h * d1))
    hF0 = 0.5 * t * Fd[..., 0]
    hF1 = 0.5 * t * Fd[..., 1]
    htK0 = h * tK0
    htK1 = h * tK1
    fd0 = 0.5 * f1 * t * d0
    fd1 = 0.5 * f1 * t * d1
    out = np.empty((*h.shape, 2, 4))
    out[..., 0, 0] = hF0 + htK0 + fd0
    out[..., 1, 0] = hF1 + htK1 - fd1
    out[..., 0, 3] = hF0 - htK0 - fd0
    out[..., 1, 3] = hF1 - htK1 + fd1
    out[..., 0, 1] = x10 * tK0 + 2.0 * fd1
    out[..., 1, 1] = x10 * tK1
    out[..., 0, 2] = x01 * tK0
    out[..., 1, 2] = x01 * tK1 + 2.0 * fd0
    return out


def _model_batch(theta: np.ndarray, bt: _Batch, jacobian: bool, xfg: tuple | None = None):
    """Model values (B, n, 2) and, optionally, their Jacobian (B, n, 2, P)."""
    B = theta.shape[0]
    R = bt.n_traj
    off = 4 if bt.kind == "known" else 6
    start = theta[:, off:].reshape(B, R, 2)[:, bt.traj]  # (B, n, 2)
    X, F, G = _exponentials(theta[:, :4], bt) if xfg is None else xfg
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        if bt.kind == "offset":
            assert G is not None
            b = theta[:, 4:6]
            model = _mv(F, start) + _mv(G, b[:, None, :])
            d = start
        else:
            v = np.broadcast_to(bt.eq, (B, 2)) if bt.kind == "known" else theta[:, 4:6]
            d = start - v[:, None, :]
            model = v[:, None, :] + _mv(F, d)
        if not jacobian:
            return model, None
        n = bt.tau.size
        J = np.zeros((B, n, 2, bt.n_par))
        s, h, q, f0, f1, g = linalg2.expm_parts(X)
        J[..., :4] = _unit_directions(X, bt.tau, d, (h, f0, 0.5 * f1, f1, f1, g))
        if bt.kind == "offset":
            _, h2, _, _, c, a_s, a_q, c_s, c_q = linalg2.phi1_parts(X)
            bb = np.broadcast_to(b[:, None, :], d.shape)
            J[..., :4] += bt.tau[None, :, None, None] * _unit_directions(
                X, bt.tau, bb, (h2, a_s, a_q, c, c_s, c_q)
            )
            J[..., 4:6] = G
        elif bt.kind == "equilibrium":
            J[..., 4:6] = np.eye(2) - F
        rows = np.arange(n)
        col = off + 2 * bt.traj
        J[:, rows, :, col] = np.swapaxes(F[..., 0], 0, 1)
        J[:, rows, :, col + 1] = np.swapaxes(F[..., 1], 0, 1)
    return model, J


def _amplification(theta: np.ndarray, bt: _Batch) -> np.ndarray:
    """Factor (B,) by which the model of each row amplifies the rounding of its parameters.

    The model ``x* + expm(A tau) (x0 - x*)`` (or ``expm(A tau) x0 + tau phi1(A tau) b``)
    is evaluated from parameters rounded to double precision; its absolute error is
    about machine epsilon times ``max |expm(A tau)| * max(1, |x0|, |x*|)`` (plus the
    ``b`` term), in internal units where each channel has spread 1.  A fast unstable
    mode over a long record (``exp(Re lambda T)`` huge) makes this factor explode:
    the fitted trajectory then hangs on digits the parameters do not have.
    ``inf`` where not finite.
    """
    B = theta.shape[0]
    off = 4 if bt.kind == "known" else 6
    _, F, G = _exponentials(theta[:, :4], bt)
    with np.errstate(over="ignore", invalid="ignore"):
        size = np.max(np.abs(theta[:, off:]), axis=1, initial=1.0)
        if bt.kind == "equilibrium":
            size = np.maximum(size, np.max(np.abs(theta[:, 4:6]), axis=1))
        elif bt.kind == "known":
            assert bt.eq is not None
            size = np.maximum(size, float(np.max(np.abs(bt.eq))))
        amp = np.max(np.abs(F).reshape(B, -1), axis=1) * size
        if G is not None:
            b = np.max(np.abs(theta[:, 4:6]), axis=1)
            amp = amp + np.max(np.abs(G).reshape(B, -1), axis=1) * b
    return np.where(np.isfinite(amp), amp, np.inf)


def _evaluate(theta: np.ndarray, bt: _Batch, jacobian: bool, xfg: tuple | None = None):
    """Weighted residuals (B, n, 2) and their Jacobian (B, n, 2, P)."""
    model, J = _model_batch(theta, bt, jacobian, xfg)
    w = bt.w[:, None, :]
    with np.errstate(over="ignore", invalid="ignore"):
        e = (bt.y - model) * w
        if J is not None:
            J *= -w[..., None]
    return e, J


def _linear_design(
    F: np.ndarray, G: np.ndarray | None, bt: _Batch
) -> tuple[np.ndarray, np.ndarray]:
    """Weighted design of the linear parameters for fixed ``A``.

    The parameters are ``(u_1, ..., u_R, x*)`` with ``u_r = x0_r - x*`` (model ``x* +
    expm(A tau) u_r``; with a known equilibrium ``u_r`` alone), or ``(x0_1, ..., x0_R,
    b)`` for the offset kind.  The deviations ``u_r`` keep the columns apart where
    ``x0_r`` and ``x*`` would be nearly collinear (``expm(A tau)`` against ``I -
    expm(A tau)`` on a diverging trajectory).

    Returns ``M`` (B, 2 n, L) and the weighted targets ``y`` (B, 2 n), the known
    equilibrium subtracted.
    """
    B, n = F.shape[:2]
    R = bt.n_traj
    L = 2 * R + (0 if bt.kind == "known" else 2)
    if R == 1:
        M = np.empty((B, n, 2, L))
        M[..., :2] = F
    else:
        M = np.zeros((B, n, 2, L))
        rows = np.arange(n)
        M[:, rows, :, 2 * bt.traj] = np.swapaxes(F[..., 0], 0, 1)
        M[:, rows, :, 2 * bt.traj + 1] = np.swapaxes(F[..., 1], 0, 1)
    y = bt.y
    with np.errstate(over="ignore", invalid="ignore"):
        if bt.kind == "offset":
            assert G is not None
            M[..., 2 * R :] = G
        elif bt.kind == "equilibrium":
            M[..., 2 * R :] = np.eye(2)
        else:
            y = y - bt.eq
        w = bt.w[:, None, :]
        return (M * w[..., None]).reshape(B, 2 * n, L), (y * w).reshape(B, 2 * n)


class _LeastSquares:
    """Batched least squares with one design ``M`` (B, m, L) and many right-hand sides.

    Normal equations, equilibrated by the column norms (the diagonal of ``M'M``) and
    with a rounding-level ridge, inverted once per design; rows whose design is not
    finite give NaN.
    """

    def __init__(self, M: np.ndarray) -> None:
        L = M.shape[-1]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            N = np.einsum("bmi,bmj->bij", M, M, optimize=True)
            cs = np.sqrt(np.diagonal(N, axis1=1, axis2=2))  # column norms (B, L)
            cs = np.where(np.isfinite(cs) & (cs > 0), cs, 1.0)
            outer = cs[:, :, None] * cs[:, None, :]
            Ns = N / outer + 1e-13 * np.eye(L)
        bad = ~np.all(np.isfinite(Ns), axis=(1, 2))
        Ns[bad] = np.eye(L)
        try:
            Ninv = np.linalg.inv(Ns)
        except np.linalg.LinAlgError:
            Ninv = np.stack([np.linalg.pinv(Nb) for Nb in Ns])
        Ninv[bad] = np.nan
        self.M, self.Ninv = M, Ninv / outer

    def take(self, idx: np.ndarray) -> _LeastSquares:
        """The designs of rows ``idx`` (their inverses reused, not recomputed)."""
        out = object.__new__(_LeastSquares)
        out.M, out.Ninv = self.M[idx], self.Ninv[idx]
        return out

    def solve(self, rhs: np.ndarray, refine: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """Coefficients (B, L, k) and residuals (B, m, k) for right-hand sides (B, m, k).

        ``refine`` adds one step of iterative refinement (the corrected semi-normal
        equations: close to the accuracy of a QR solve for the ill-conditioned
        designs of diverging trajectories, at a fraction of its cost; Bjorck,
        *Numerical Methods for Least Squares Problems*, 1996, sec. 2.9).
        """
        M, Ninv = self.M, self.Ninv
        MT = np.swapaxes(M, 1, 2)
        with np.errstate(over="ignore", invalid="ignore"):
            c = Ninv @ (MT @ rhs)
            r = rhs - M @ c
            if refine:
                dc = Ninv @ (MT @ r)
                c = c + dc
                r = r - M @ dc
        return c, r


def _projected(a: np.ndarray, bt: _Batch, jacobian: bool, normal: bool = False):
    """Full parameters and, optionally, the variable-projection residuals and Jacobian.

    Returns ``theta`` (B, P), the weighted residuals ``e`` (B, 2 n) and ``Jr`` (B, 2 n,
    4) (``None`` unless ``jacobian``).  With ``normal``, ``Jr`` is replaced by its
    products ``Jr'Jr`` and ``Jr'e`` (a :class:`~fitdyn.estimators.lm.Normal`), formed
    from the unprojected Jacobian ``JA`` and ``G = M'JA`` as ``JA'JA - G'(M'M)^-1 G``
    and ``JA'e - G'(M'M)^-1 M'e`` without forming the projection.
    """
    B = a.shape[0]
    R = bt.n_traj
    X = a.reshape(B, 2, 2)[:, None] * bt.tau[None, :, None, None]
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        s, h, q, f0, f1, g = linalg2.expm_parts(X)
        x01, x10 = X[..., 0, 1], X[..., 1, 0]
        fast = R == 1 and bt.kind != "offset"
        G = None
        if fast:
            # one trajectory: the weighted design straight from the coefficients
            n = bt.tau.size
            L = 2 if bt.kind == "known" else 4
            w0, w1 = bt.w[:, :1], bt.w[:, 1:]
            Mw = np.zeros((B, n, 2, L))
            f1h = f1 * h
            Mw[..., 0, 0] = w0 * (f0 + f1h)
            Mw[..., 0, 1] = w0 * (f1 * x01)
            Mw[..., 1, 0] = w1 * (f1 * x10)
            Mw[..., 1, 1] = w1 * (f0 - f1h)
            if L == 4:
                Mw[..., 0, 2] = w0
                Mw[..., 1, 3] = w1
            y = bt.y if bt.kind != "known" else bt.y - bt.eq
            M = Mw.reshape(B, 2 * n, L)
            yw = (y * bt.w[:, None, :]).reshape(B, 2 * n)
        else:
            F = np.empty(X.shape)  # f0 I + f1 M, M = [[h, x12], [x21, -h]]
            F[..., 0, 0] = f0 + f1 * h
            F[..., 0, 1] = f1 * x01
            F[..., 1, 0] = f1 * x10
            F[..., 1, 1] = f0 - f1 * h
        if bt.kind == "offset":
            _, h2, _, pa, pc, pa_s, pa_q, pc_s, pc_q = linalg2.phi1_parts(X)
            t = bt.tau[None, :]
            G = np.empty(X.shape)  # tau (pa I + pc M)
            G[..., 0, 0] = t * (pa + pc * h)
            G[..., 0, 1] = t * pc * x01
            G[..., 1, 0] = t * pc * x10
            G[..., 1, 1] = t * (pa - pc * h)
    if not fast:
        M, yw = _linear_design(F, G, bt)
    ls = _LeastSquares(M)
    c, r = ls.solve(yw[..., None])
    lin = c[..., 0]
    if bt.kind == "offset":
        x0 = lin[:, : 2 * R]
        d = None
    else:
        v = np.broadcast_to(bt.eq, (B, 2)) if bt.kind == "known" else lin[:, 2 * R :]
        u = lin[:, : 2 * R].reshape(B, R, 2)
        x0 = (u + v[:, None, :]).reshape(B, 2 * R)
        d = u if R == 1 else u[:, bt.traj]  # x0_r - x* on every sample (broadcast)
    theta = np.concatenate([a, lin[:, 2 * R :], x0], axis=1)
    e = r[..., 0]
    if not jacobian:
        return theta, e, None
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        if d is None:
            d = x0.reshape(B, R, 2)
            d = d if R == 1 else d[:, bt.traj]
        if fast:
            d0, d1 = d[..., 0], d[..., 1]
            Fd = np.stack(
                [f0 * d0 + f1 * (h * d0 + x01 * d1), f0 * d1 + f1 * (x10 * d0 - h * d1)], axis=-1
            )
        else:
            Fd = _mv(F, d)
        JA = _expm_directions(X, bt.tau, d, Fd, (h, f1, g))
        if bt.kind == "offset":
            bb = lin[:, None, 2 * R :]
            JA += bt.tau[None, :, None, None] * _unit_directions(
                X, bt.tau, bb, (h2, pa_s, pa_q, pc, pc_s, pc_q)
            )
        JA *= -bt.w[:, None, :, None]
        JAf = JA.reshape(B, -1, 4)
        if normal:
            JAt = np.swapaxes(JAf, 1, 2)
            MT = np.swapaxes(ls.M, 1, 2)
            G = MT @ JAf  # (B, L, 4)
            NG = ls.Ninv @ G
            full = JAt @ JAf
            jtj = full - np.swapaxes(G, 1, 2) @ NG
            jtj = 0.5 * (jtj + np.swapaxes(jtj, 1, 2))
            grad = (JAt @ e[:, :, None])[..., 0] - np.einsum(
                "bli,bl->bi", NG, (MT @ e[:, :, None])[..., 0]
            )
            # where the projection removes all but a sliver of JA (more than eight
            # digits cancel), form the projected Jacobian itself for those rows
            kept = np.trace(jtj, axis1=1, axis2=2)
            whole = np.trace(full, axis1=1, axis2=2)
            with np.errstate(invalid="ignore"):
                thin = np.flatnonzero(~(kept > _CANCEL * whole))
            if thin.size:
                Jr_t = ls.take(thin).solve(JAf[thin], refine=False)[1]
                Jrt = np.swapaxes(Jr_t, 1, 2)
                jtj[thin] = Jrt @ Jr_t
                grad[thin] = (Jrt @ e[thin][:, :, None])[..., 0]
            return theta, e, Normal(jtj, grad)
        Jr = ls.solve(JAf, refine=False)[1]
    return theta, e, Jr


def _expand(a: np.ndarray, bt: _Batch) -> np.ndarray:
    """Full parameters ``(a, v, x0)`` (B, P) with the best linear parameters for ``a``."""
    return _projected(a, bt, False)[0]


def _evaluate_projected(a: np.ndarray, bt: _Batch, jacobian: bool):
    """Variable projection: residuals and Jacobian of the problem in ``A`` alone.

    For fixed ``A`` the model is linear in the starting states and ``x*`` (or
    ``b``); those are solved by linear least squares inside the residual (Golub &
    Pereyra, *SIAM J. Numer. Anal.* 10, 1973), and the Jacobian is Kaufman's
    (*BIT* 15, 1975): the full Jacobian's ``A`` columns projected onto the
    orthogonal complement of the linear parameters' design.  The reduced problem
    (four parameters) is far better conditioned than the full one, whose starting
    states and equilibrium are nearly collinear for diverging trajectories.
    """
    theta, e, Jr = _projected(a, bt, True, normal=True)
    return e, Jr, theta


def _model(theta: np.ndarray, prob: _Problem, kind: str) -> np.ndarray:
    """Model values (n, 2) of one parameter vector in internal units."""
    bt = _batch(prob, kind, prob.y, np.ones(2))
    return _model_batch(theta[None], bt, False)[0][0]


def _singular(A: np.ndarray) -> bool:
    rho = float(np.max(np.abs(linalg2.eigvals(A))))
    return rho == 0 or abs(float(np.linalg.det(A))) <= _SINGULAR * rho**2


class _Budget:
    """Wall-clock budget of one call: the seconds left for the next solve."""

    def __init__(self, seconds: float | None) -> None:
        self.end = None if seconds is None else time.perf_counter() + float(seconds)

    def left(self) -> float | None:
        return None if self.end is None else max(self.end - time.perf_counter(), 0.0)


class TrajectoryEstimator(NonlinearEstimator):
    """Output-error (trajectory-matching) fit, batched Levenberg-Marquardt.

    Parameters
    ----------
    start : {"integral", "derivative", "both"}
        Which fast estimator(s) give the starting values (default ``"integral"``).
    weights : pair of float, optional
        Fixed per-channel residual weights (in 1 / channel units).
    noise_sd : pair of float, optional
        Known measurement noise standard deviations; implies ``weights = 1 / noise_sd``
        and an unscaled covariance.
    frequencies : sequence of float
        Factors applied to the starting estimate's ``|Im lambda|`` for the extra
        starts on oscillatory data (default ``(0.5, 0.75, 1.5, 2.0)``; empty for
        none).
    max_iterations : int
        Levenberg-Marquardt iteration cap of each solve (each weighting round),
        default 100.
    xtol : float
        Relative step size at which an iteration counts as converged (default 1e-10).
    time_budget : float or None
        Wall-clock seconds one call of :meth:`fit` may spend iterating (default 30),
        and as many for all the calls of :meth:`fit_values` that refit replicates of
        that point fit (the bootstrap's chunks share one budget); rows still iterating
        then stop and count as not converged.  ``None``: no limit.
    """

    name = "trajectory"
    needs_uniform_steps = False

    def __init__(
        self,
        start: str = "integral",
        weights: Any = None,
        noise_sd: Any = None,
        frequencies: Any = (0.5, 0.75, 1.5, 2.0),
        max_iterations: int = 100,
        xtol: float = 1e-10,
        time_budget: float | None = 30.0,
        **unknown: Any,
    ) -> None:
        reject_unknown(
            self.name,
            unknown,
            (
                "start",
                "weights",
                "noise_sd",
                "frequencies",
                "max_iterations",
                "xtol",
                "time_budget",
            ),
        )
        if start not in ("integral", "derivative", "both"):
            raise EstimationError(
                f"start must be 'integral', 'derivative' or 'both', got {start!r}"
            )
        if weights is not None and noise_sd is not None:
            raise EstimationError("give weights or noise_sd, not both")
        for label, val in (("weights", weights), ("noise_sd", noise_sd)):
            if val is not None:
                arr = np.asarray(val, dtype=float).reshape(-1)
                if arr.size == 1:
                    arr = np.repeat(arr, 2)
                if arr.shape != (2,) or not np.all(np.isfinite(arr)) or np.any(arr <= 0):
                    raise EstimationError(
                        f"{label} must be one or two positive numbers (one per channel), "
                        f"got {np.asarray(val).tolist()}"
                    )
                if label == "weights":
                    weights = tuple(float(v) for v in arr)
                else:
                    noise_sd = tuple(float(v) for v in arr)
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
        if time_budget is not None:
            time_budget = float(time_budget)
            if not (np.isfinite(time_budget) and time_budget > 0):
                raise EstimationError(
                    f"time_budget must be a positive number of seconds or None, got {time_budget!r}"
                )
        super().__init__(
            start=start,
            weights=weights,
            noise_sd=noise_sd,
            frequencies=freqs,
            max_iterations=iters,
            xtol=tol,
            time_budget=time_budget,
        )
        self._reference: dict[str, Any] | None = None
        #: set by ``auto`` on its diagnostic fit: when the first-stage residuals' lag-1
        #: autocorrelation exceeds it, the weighting rounds are skipped (the fit only
        #: decides whether the residuals are white; reweighting moved the lag-1 by at
        #: most 0.08 on 415 benchmark records, and ``auto`` keeps a fit only up to 0.3)
        self._screen_lag1: float | None = None
        #: replicates, non-converged count and reasons of the last :meth:`fit_values`
        self.last_failures: dict[str, Any] = {}

    # -- the problem ------------------------------------------------------------------------
    def _problem(self, rec: Recording, values: np.ndarray, eq: np.ndarray | None) -> _Problem:
        t = np.asarray(rec.times, dtype=float)
        traj = np.asarray(rec.trajectory, dtype=np.int64)
        R = rec.n_trajectories
        first = np.full(R, np.nan)
        for r in range(R):
            m = traj == r
            if not m.any():
                raise EstimationError(f"trajectory '{rec.trajectory_names[r]}' has no samples")
            first[r] = t[m].min()
        tau = t - first[traj]
        T = float(np.max(tau)) if tau.size else 0.0
        if not T > 0:
            raise TooFewSamplesError(
                "every trajectory has a single time; the trajectory fit needs samples "
                "spread in time",
                source=rec.source,
            )
        mu = values.mean(axis=0)
        sd = values.std(axis=0)
        sd = np.where(sd > 0, sd, np.maximum(np.abs(mu), 1.0))
        eq_i = None if eq is None else (eq - mu) / sd
        return _Problem(
            tau=tau / T,
            traj=traj,
            y=(values - mu) / sd,
            n_traj=R,
            mu=mu,
            sd=sd,
            T=T,
            eq=eq_i,
        )

    def _starts(
        self, rec: Recording, eq: np.ndarray | None, prob: _Problem, values: np.ndarray
    ) -> tuple[list[tuple[str, np.ndarray]], str, list[str]]:
        """Starting parameter vectors (internal units), the parameterisation, notes."""
        from fitdyn.estimators.derivative import DerivativeEstimator
        from fitdyn.estimators.integral import IntegralEstimator

        rec_v = rec.with_values(values)
        fast: list[tuple[str, Estimate]] = []
        failures = []
        order = {"integral": ["integral"], "derivative": ["derivative"]}.get(
            self.settings["start"], ["integral", "derivative"]
        )
        for name in order:
            try:
                est = (IntegralEstimator() if name == "integral" else DerivativeEstimator()).fit(
                    rec_v, eq
                )
            except FitdynError as exc:
                failures.append(f"{name}: {exc}")
                continue
            if np.all(np.isfinite(est.matrix)) and np.all(np.isfinite(est.offset)):
                fast.append((name, est))
        if not fast:
            # the other fast estimator as a last resort
            other = "derivative" if order == ["integral"] else "integral"
            try:
                est = (IntegralEstimator() if other == "integral" else DerivativeEstimator()).fit(
                    rec_v, eq
                )
                if np.all(np.isfinite(est.matrix)):
                    fast.append((other, est))
            except FitdynError as exc:
                failures.append(f"{other}: {exc}")
        notes = [f"no start from {f}" for f in failures]
        # each start: (label, A, x*, b, x0) in internal units
        cands: list[tuple[str, np.ndarray, np.ndarray | None, np.ndarray, np.ndarray]] = []
        for name, est in fast:
            A_i = prob.to_internal_A(est.matrix)
            xs = est.equilibrium
            xs_i = None if xs is None else (np.asarray(xs, dtype=float) - prob.mu) / prob.sd
            b_i = prob.T * (np.asarray(est.offset) + est.matrix @ prob.mu) / prob.sd
            x0_i = self._initial_states(rec, est, name, values, prob)
            cands.append((name, A_i, xs_i, b_i, x0_i))
        if not cands:
            # no fast estimate (e.g. data along one direction only): a plain decay over
            # the record towards the mean, from the first samples
            x0_i = np.array([prob.y[np.flatnonzero(prob.traj == r)[0]] for r in range(prob.n_traj)])
            xs_i = np.zeros(2) if eq is None else prob.eq
            # b = -A x* with A = -I
            cands.append(("plain decay", -np.eye(2), xs_i, xs_i.copy(), x0_i))
            notes.append("no fast estimate available; started from a plain decay")
        # the parameterisation follows the first start
        _, A0, xs0, _, _ = cands[0]
        rho = float(np.max(np.abs(linalg2.eigvals(A0))))
        det = float(np.linalg.det(A0))
        if eq is not None:
            kind = "known"
        else:
            far = xs0 is None or float(np.max(np.abs(xs0))) > 1e3
            singular = rho == 0 or abs(det) <= _SINGULAR * rho**2
            kind = "offset" if (singular or far) else "equilibrium"
        starts: list[tuple[str, np.ndarray]] = []
        for name, A_i, xs_i, b_i, x0_i in cands:
            if kind == "known":
                v = np.zeros(0)
            elif kind == "equilibrium":
                v = xs_i if xs_i is not None else np.zeros(2)
            else:
                v = b_i
            theta = np.concatenate([A_i.ravel(), v, x0_i.ravel()])
            starts.append((name, theta))
            tau_, _, disc = linalg2.invariants(A_i)
            if disc < 0 and self.settings["frequencies"]:
                s = 0.5 * tau_
                Mf = A_i - s * np.eye(2)
                for f in self.settings["frequencies"]:
                    th = theta.copy()
                    th[:4] = (s * np.eye(2) + f * Mf).ravel()
                    starts.append((f"{name} x{f:g} frequency", th))
        return starts, kind, notes

    @staticmethod
    def _initial_states(
        rec: Recording, est: Estimate, name: str, values: np.ndarray, prob: _Problem
    ) -> np.ndarray:
        """Starting state of each trajectory (internal units)."""
        R = rec.n_trajectories
        x0 = np.zeros((R, 2))
        seg_states = est.extra.get("segment_initial_states") if name == "integral" else None
        bounds = rec.segment_bounds()
        traj = np.asarray(rec.trajectory)
        for r in range(R):
            k = next(i for i, (a, _) in enumerate(bounds) if traj[a] == r)
            a = bounds[k][0]
            x0[r] = seg_states[k] if seg_states is not None else values[a]
        return (x0 - prob.mu) / prob.sd

    # -- solving ---------------------------------------------------------------------------
    def _lm(
        self, theta0: np.ndarray, bt: _Batch, budget: _Budget, max_iter: int | None = None
    ) -> Solution:
        """Batched solve from ``theta0`` (B, P) by variable projection; full parameters back.

        ``max_iter`` overrides the ``max_iterations`` setting (the search's rounds).
        """
        sol = levenberg_marquardt(
            np.ascontiguousarray(theta0[:, :4]),
            bt,
            _evaluate_projected,
            bt.scale(),
            self.settings["max_iterations"] if max_iter is None else max_iter,
            self.settings["xtol"],
            _FTOL,
            time_budget=budget.left(),
            stall_tol=_STALL,
        )
        assert sol.aux is not None
        sol.theta = sol.aux  # the full parameters of the final point
        return sol

    def _fit_batch(
        self, theta0: np.ndarray, bt: _Batch, how: str, budget: _Budget
    ) -> dict[str, np.ndarray]:
        """Fit every row of ``bt`` from ``theta0`` (B, P), reweighting when estimated.

        With ``how == "estimated"`` the weights are ``1 / sd`` of each channel's
        residuals, the fit repeated until they settle (at most
        ``_REWEIGHT_ROUNDS`` rounds): the fixed point maximises the Gaussian
        likelihood with unknown per-channel noise variances (each variance profiled
        out), so it does not depend on the starting weights.  Rows whose residuals
        are too small to estimate a noise level (noise-free data) keep their
        weights (``estimated`` False).  Only the rows still changing are refitted; a
        row whose solve does not converge keeps that solve's result and leaves the
        reweighting, so a row costs at most one non-converged solve.

        Returns
        -------
        dict with ``theta`` (B, P), ``w`` (B, 2), ``cost``, ``converged``,
        ``iterations``, ``status`` and ``estimated`` (B,)
        """
        B = theta0.shape[0]
        theta = np.array(theta0, dtype=float)
        w = bt.w.copy()
        cost = np.full(B, np.inf)
        conv = np.zeros(B, dtype=bool)
        iters = np.zeros(B, dtype=int)
        status = np.ones(B, dtype=int)
        estimated = np.zeros(B, dtype=bool)
        fitted = np.zeros(B, dtype=bool)

        n = bt.tau.size
        resid = np.full((B, n, 2), np.nan)  # unweighted residuals at theta

        def run(rows: np.ndarray) -> None:
            if rows.size == 0:
                return
            sol = self._lm(theta[rows], replace(bt, y=bt.y[rows], w=w[rows]), budget)
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                resid[rows] = sol.residuals.reshape(rows.size, n, 2) / w[rows][:, None, :]
            theta[rows] = sol.theta
            cost[rows] = sol.cost
            conv[rows] = sol.converged
            iters[rows] += sol.iterations
            status[rows] = sol.status
            fitted[rows] = True

        if how == "estimated":
            dof = max(n - bt.n_par / 2.0, 1.0)
            settled = np.zeros(B, dtype=bool)
            # the first weights from the residuals at the start, the linear
            # parameters (starting states, x* or b) re-solved for each row
            _, e0, _ = _projected(np.ascontiguousarray(theta[:, :4]), bt, False)
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                resid[:] = e0.reshape(B, n, 2) / bt.w[:, None, :]
            for _ in range(_REWEIGHT_ROUNDS):
                act = np.flatnonzero(~settled)
                if act.size == 0:
                    break
                with np.errstate(over="ignore", invalid="ignore"):
                    s_hat = np.sqrt(np.sum(resid[act] ** 2, axis=1) / dof)
                    ok = np.all(np.isfinite(s_hat) & (s_hat > 1e-9), axis=1)
                    w_new = 1.0 / np.where(ok[:, None], s_hat, 1.0)
                    change = np.max(np.abs(w_new / w[act] - 1.0), axis=1)
                w[act[ok]] = w_new[ok]
                estimated[act[ok]] = True
                done = ~ok | (fitted[act] & (change < _REWEIGHT_CHANGE))
                settled[act[done]] = True
                todo = act[~done]
                run(todo)
                # a solve that did not converge ends the reweighting of its row: weights
                # from a point that is no minimum mean nothing, and refitting it round
                # after round would multiply the iteration cap by the rounds
                settled[todo[~conv[todo]]] = True
        run(np.flatnonzero(~fitted))
        return {
            "theta": theta,
            "w": w,
            "cost": cost,
            "converged": conv,
            "iterations": iters,
            "status": status,
            "estimated": estimated,
        }

    def _weights0(self, prob: _Problem) -> tuple[np.ndarray, str]:
        """Stage-one weights in internal units and how they were set."""
        if self.settings["noise_sd"] is not None:
            return prob.sd / np.asarray(self.settings["noise_sd"]), "known noise sd"
        if self.settings["weights"] is not None:
            return prob.sd * np.asarray(self.settings["weights"]), "given weights"
        return np.ones(2), "estimated"

    def _search(
        self,
        starts: list[tuple[str, np.ndarray]],
        prob: _Problem,
        kind: str,
        w: np.ndarray,
        budget: _Budget,
    ) -> tuple[np.ndarray, str, list[dict[str, Any]], int]:
        """Best start: every start one row of one batched solve, the lowest cost wins.

        The solve works by variable projection (:func:`_evaluate_projected`): for
        each ``A`` the starting states and ``x*`` (or ``b``) are solved by linear
        least squares inside the residual, so a start needs only its ``A``.
        """
        theta0 = [th for _, th in starts]
        S = len(starts)
        bt = _batch(prob, kind, np.broadcast_to(prob.y, (S, *prob.y.shape)), w)
        cap = int(self.settings["max_iterations"])
        first = min(cap, _SEARCH_ROUND) if S > 1 else cap
        sol = self._lm(np.array(theta0), bt, budget, first)
        abandoned = np.zeros(S, dtype=bool)
        going = ~sol.converged & (sol.status == 1)  # stopped by the first round's cap
        if np.any(going) and first < cap:
            done = sol.converged & np.isfinite(sol.cost)
            if np.any(done):
                # a start still iterating at many times the best converged cost has
                # fallen into a worse basin (or diverges): it is not continued
                abandoned = going & (sol.cost > _ABANDON * np.min(sol.cost[done]))
            rows = np.flatnonzero(going & ~abandoned)
            if rows.size:
                more = self._lm(sol.theta[rows], bt.take(rows), budget, cap - first)
                sol.theta[rows] = more.theta
                sol.cost[rows] = more.cost
                sol.converged[rows] = more.converged
                sol.status[rows] = more.status
                sol.iterations[rows] += more.iterations
        tried = [
            {
                "start": label,
                "cost": float(sol.cost[k]),
                "iterations": int(sol.iterations[k]),
                "converged": bool(sol.converged[k]),
                **({"abandoned": True} if abandoned[k] else {}),
            }
            for k, (label, _) in enumerate(starts)
        ]
        best = int(np.argmin(sol.cost))
        return sol.theta[best], starts[best][0], tried, int(sol.iterations.sum())

    def _solve(
        self,
        rec: Recording,
        values: np.ndarray,
        eq: np.ndarray | None,
        budget: _Budget | None = None,
    ) -> dict[str, Any]:
        """The whole procedure on one set of values."""
        if budget is None:
            budget = _Budget(self.settings["time_budget"])
        prob = self._problem(rec, values, eq)
        n_par = 4 + (0 if eq is not None else 2) + 2 * prob.n_traj
        if 2 * rec.n_samples <= n_par:
            raise TooFewSamplesError(
                f"the trajectory fit has {2 * rec.n_samples} values for {n_par} parameters; "
                "record more samples",
                source=rec.source,
            )
        starts, kind, notes = self._starts(rec, eq, prob, values)
        w, how = self._weights0(prob)
        scale = how != "known noise sd"
        theta, label, tried, iterations = self._search(starts, prob, kind, w, budget)
        best = next(t for t in tried if t["start"] == label)
        fit = {
            "theta": theta[None],
            "w": w[None],
            "cost": np.array([best["cost"]]),
            "converged": np.array([best["converged"]]),
            "status": np.array([0 if best["converged"] else 1]),
        }
        screened = None
        if how == "estimated" and self._screen_lag1 is not None:
            bt0 = _batch(prob, kind, prob.y, w)
            _, e0, _ = _projected(np.ascontiguousarray(theta[None, :4]), bt0, False)
            lag = residual_lag1(e0.reshape(-1, 2), rec.segment)
            if np.isfinite(lag) and lag > self._screen_lag1:
                screened = lag
        if screened is not None:
            how = "channel spreads (the noise weights were not estimated: see the notes)"
            notes.append(
                f"residuals at the first stage have lag-1 autocorrelation {screened:.2f} > "
                f"{self._screen_lag1:g}: far from white, so the weighting rounds were "
                "skipped (this fit only screens for measurement noise)"
            )
        elif how == "estimated":
            fit = self._fit_batch(theta[None], _batch(prob, kind, prob.y, w), how, budget)
            iterations += int(fit["iterations"][0])
            if not fit["estimated"][0]:
                how = "channel spreads; the residuals are too small to estimate the noise"
        theta, w = fit["theta"][0], fit["w"][0]
        converged, status, cost = bool(fit["converged"][0]), int(fit["status"][0]), fit["cost"][0]
        if kind == "equilibrium" and _singular(theta[:4].reshape(2, 2)):
            # a nearly singular result: the equilibrium runs away; refit by offset
            A_i = theta[:4].reshape(2, 2)
            th_b = np.concatenate([theta[:4], -A_i @ theta[4:6], theta[6:]])
            sol_b = self._lm(th_b[None], _batch(prob, "offset", prob.y, w), budget)
            iterations += int(sol_b.iterations[0])
            tried.append(
                {
                    "start": "offset refit",
                    "cost": float(sol_b.cost[0]),
                    "iterations": int(sol_b.iterations[0]),
                    "converged": bool(sol_b.converged[0]),
                }
            )
            if sol_b.cost[0] <= cost:
                theta, kind, cost = sol_b.theta[0], "offset", sol_b.cost[0]
                converged, status = bool(sol_b.converged[0]), int(sol_b.status[0])
                notes.append("nearly singular A: refitted with the offset b as parameter")
        return {
            "prob": prob,
            "kind": kind,
            "theta": theta,
            "w": w,
            "weights_how": how,
            "scale": scale,
            "start": label,
            "tried": tried,
            "iterations": iterations,
            "converged": converged,
            "status": status,
            "cost": float(cost),
            "notes": notes,
            "screened": screened is not None,
        }

    # -- mapping back ------------------------------------------------------------------------
    @staticmethod
    def _original(theta: np.ndarray, prob: _Problem, kind: str) -> dict[str, np.ndarray]:
        A_i, v, x0 = _split(theta, prob, kind)
        A = prob.to_original_A(A_i)
        x0_o = prob.mu + prob.sd * x0
        if kind == "offset":
            b = prob.sd * v / prob.T - A @ prob.mu
            xs = None
            v_o = b
        else:
            xs = prob.mu + prob.sd * v
            b = -A @ xs
            v_o = xs
        return {"A": A, "b": b, "xs": xs, "v": v_o, "x0": x0_o}

    @staticmethod
    def _original_batch(
        theta: np.ndarray, prob: _Problem, kind: str
    ) -> tuple[np.ndarray, np.ndarray]:
        """``A`` (B, 2, 2) and ``b`` (B, 2) in original units of a batch of parameters."""
        B = theta.shape[0]
        mu, sd, T = prob.mu, prob.sd, prob.T
        with np.errstate(over="ignore", invalid="ignore"):
            A = theta[:, :4].reshape(B, 2, 2) * sd[None, :, None] / sd[None, None, :] / T
            if kind == "offset":
                b = sd * theta[:, 4:6] / T - A @ mu
            else:
                v = np.broadcast_to(prob.eq, (B, 2)) if kind == "known" else theta[:, 4:6]
                xs = mu + sd * v
                b = -np.einsum("bij,bj->bi", A, xs)
        return A, b

    def _jacobians(
        self, theta: np.ndarray, prob: _Problem, kind: str
    ) -> tuple[np.ndarray, np.ndarray]:
        """d(a, b)/d theta (6, p) and d(original params)/d theta (p, p).

        The maps are linear in each parameter separately (``b = -A x*`` is bilinear),
        so central differences are exact up to rounding.
        """
        p = theta.size

        def six(th):
            o = self._original(th, prob, kind)
            return np.concatenate([o["A"].ravel(), o["b"]])

        def full(th):
            o = self._original(th, prob, kind)
            v = o["v"] if kind != "known" else np.zeros(0)
            return np.concatenate([o["A"].ravel(), v, o["x0"].ravel()])

        J6 = np.zeros((6, p))
        Jf = np.zeros((p, p))
        for k in range(p):
            h = 1e-3 * max(1.0, abs(theta[k]))
            tp = theta.copy()
            tm = theta.copy()
            tp[k] += h
            tm[k] -= h
            J6[:, k] = (six(tp) - six(tm)) / (2 * h)
            Jf[:, k] = (full(tp) - full(tm)) / (2 * h)
        return J6, Jf

    def _covariances(self, sol: dict[str, Any]):
        """(param_cov (6, 6) or None, covariance of the original parameters or None,
        warnings, statistics of the fit)."""
        theta, prob, kind = sol["theta"], sol["prob"], sol["kind"]
        names = _names(prob.n_traj, kind)
        warns: list[str] = []
        e, J = _evaluate(theta[None], _batch(prob, kind, prob.y, sol["w"]), True)
        assert J is not None
        P = theta.size
        jac = J[0].reshape(-1, P)
        ndata = jac.shape[0]
        chisqr = float(np.sum(e * e))
        redchi = chisqr / (ndata - P) if ndata > P else float("nan")
        stats = {"ndata": ndata, "nvarys": P, "chisqr": chisqr, "redchi": redchi}
        unidentified: list[str] = []
        covar = None
        if np.all(np.isfinite(jac)):
            _, s, Vt = np.linalg.svd(jac, full_matrices=False)
            if s.size and s[0] > 0:
                null = s / s[0] < 1e-7
                for vec in Vt[null]:
                    for nm, comp in zip(names, vec, strict=True):
                        if abs(comp) > 0.2 and nm not in unidentified:
                            unidentified.append(nm)
                if not unidentified:
                    # J'J^{-1} from the singular value decomposition
                    covar = (Vt.T / s**2) @ Vt
                    if sol["scale"]:
                        covar = covar * redchi
            else:
                unidentified = list(names)
        ok = (
            covar is not None
            and np.all(np.isfinite(covar))
            and bool(np.all(np.diag(covar) > 0))
            and not unidentified
        )
        if unidentified:
            warns.append(
                "the trajectory fit leaves parameter(s) unidentified (near-zero singular "
                f"values of the Jacobian): {', '.join(_pretty(unidentified))}; no asymptotic "
                "covariance is reported, use a bootstrap or more informative data"
            )
        elif not ok:
            warns.append(
                "no covariance for the trajectory fit (singular or non-finite Jacobian); "
                "use a bootstrap for the uncertainty"
            )
        if not ok:
            return None, None, warns, stats
        J6, Jf = self._jacobians(theta, prob, kind)
        C = np.asarray(covar, dtype=float)
        cov6 = J6 @ C @ J6.T
        covf = Jf @ C @ Jf.T
        return 0.5 * (cov6 + cov6.T), 0.5 * (covf + covf.T), warns, stats

    def _report(self, sol: dict[str, Any], covf: np.ndarray | None, stats: dict) -> str:
        """The point fit's parameters in the recording's units, as plain text.

        Values, standard errors (from the asymptotic covariance) and the notable
        correlations, after a few lines on the solve and its fit statistics.
        """
        theta, prob, kind = sol["theta"], sol["prob"], sol["kind"]
        o = self._original(theta, prob, kind)
        names = _names(prob.n_traj, kind)
        vals = np.concatenate(
            [o["A"].ravel(), o["v"] if kind != "known" else np.zeros(0), o["x0"].ravel()]
        )
        what = "xs = equilibrium" if kind == "equilibrium" else "b = offset"
        lines = [
            "output-error fit: batched Levenberg-Marquardt, closed-form Jacobian, "
            f"{sol['iterations']} iterations, "
            + ("converged" if sol["converged"] else f"not converged ({STATUS[sol['status']]})"),
            f"  {stats['ndata']} values, {stats['nvarys']} parameters; weighted sum of squares "
            f"{stats['chisqr']:.6g} (per degree of freedom {stats['redchi']:.6g}, internal "
            "scaled units)",
            f"parameters (recording units; a = system matrix, {what}, x0_r_j = starting "
            "state of trajectory r, channel j):",
        ]
        sd = None if covf is None else np.sqrt(np.clip(np.diag(covf), 0.0, None))
        width = max(len(n) for n in names)
        for k, (nm, val) in enumerate(zip(names, vals, strict=True)):
            row = f"  {nm:<{width}}  {val: .6g}"
            if sd is not None:
                rel = f" ({100 * sd[k] / abs(val):.3g} %)" if val != 0 else ""
                row += f"  +/- {sd[k]:.3g}{rel}"
            lines.append(row)
        if covf is not None and sd is not None:
            pairs = []
            for a in range(len(names)):
                for b in range(a + 1, len(names)):
                    if sd[a] > 0 and sd[b] > 0:
                        r = float(covf[a, b] / (sd[a] * sd[b]))
                        if abs(r) >= 0.5:
                            pairs.append((abs(r), f"  {names[a]} with {names[b]}: {r:+.3f}"))
            if pairs:
                lines.append("correlations of at least 0.5 in size, largest first:")
                lines.extend(t for _, t in sorted(pairs, key=lambda p: -p[0]))
        else:
            lines.append("  (no standard errors: the asymptotic covariance is not available)")
        return "\n".join(lines)

    # -- protocol -----------------------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Output-error point estimate (see the module notes)."""
        eq = check_equilibrium(equilibrium)
        values = np.asarray(rec.values, dtype=float)
        sol = self._solve(rec, values, eq)
        prob, kind, theta = sol["prob"], sol["kind"], sol["theta"]
        o = self._original(theta, prob, kind)
        amp = float(_amplification(theta[None], _batch(prob, kind, prob.y, sol["w"]))[0])
        if not amp <= _MAX_AMPLIFICATION:
            raise EstimationError(_beyond_precision(rec, values, o["A"], amp), source=rec.source)
        model = prob.mu + prob.sd * _model(theta, prob, kind)
        resid = values - model
        n_par = theta.size
        dof = max(rec.n_samples - n_par / 2.0, 1.0)
        rcov = resid.T @ resid / dof
        cov6, covf, cov_warns, stats = self._covariances(sol)
        A, b = o["A"], o["b"]
        if eq is not None:
            eq_out: np.ndarray | None = eq
        elif kind == "equilibrium":
            eq_out = o["xs"]
        else:
            from fitdyn.estimators.base import equilibrium_from

            xs = equilibrium_from(A, b)
            eq_out = None if np.any(np.isnan(xs)) else xs
        w_orig = sol["w"] / prob.sd
        notes = [
            "output-error fit of x(t) = x* + expm(A (t - t0)) (x0 - x*) by batched "
            f"Levenberg-Marquardt, {rec.n_trajectories} trajectory start state(s) fitted",
            f"parameterised by {'the offset b' if kind == 'offset' else 'the equilibrium'}"
            if eq is None
            else "equilibrium given, not fitted",
            f"channel weights {w_orig[0]:.4g}, {w_orig[1]:.4g} ({sol['weights_how']})",
            f"best of {len(sol['tried'])} start(s): {sol['start']}; "
            f"{sol['iterations']} iteration(s) in all",
            *sol["notes"],
        ]
        if sol["scale"]:
            notes.append("covariance scaled by the reduced chi-square (noise sd estimated)")
        else:
            notes.append("covariance not scaled (noise sd given)")
        warns = list(cov_warns)
        if not sol["converged"]:
            warns.append(
                f"the trajectory fit did not converge ({STATUS[sol['status']]}); the estimate "
                "may be inaccurate (raise max_iterations or time_budget, or check the data)"
            )
        rho1 = residual_lag1(resid, np.asarray(rec.segment))
        # rounding-level residuals (noise-free data) have no meaningful correlation
        visible = bool(np.all(np.sqrt(np.diag(rcov)) > 1e-8 * prob.sd))
        if visible and np.isfinite(rho1) and rho1 > 0.5:
            warns.append(
                f"residuals are strongly autocorrelated (lag-1 {rho1:.2f}): process noise or "
                "a model misfit; the output-error covariance then understates the "
                "uncertainty (consider method 'discrete' or 'integral' with a block bootstrap)"
            )
        self._reference = {
            "times": np.asarray(rec.times, dtype=float).copy(),
            "trajectory": np.asarray(rec.trajectory).copy(),
            "eq": None if eq is None else eq.copy(),
            "kind": kind,
            "theta": theta.copy(),
            "w": sol["w"].copy(),
            "scale": sol["scale"],
            "how": "estimated" if self._weights0(prob)[1] == "estimated" else sol["weights_how"],
            "mu": prob.mu.copy(),
            "sd": prob.sd.copy(),
            "T": prob.T,
            # one budget for all refits of this point fit, however the caller chunks
            # them (created at the first refit)
            "budget": None,
            "converged": bool(sol["converged"]),
        }
        extra = {
            "initial_states": o["x0"],
            "parameter_report": self._report(sol, covf, stats),
            "iterations": int(sol["iterations"]),
            "starts": sol["tried"],
            "parameterisation": "offset" if kind == "offset" else "equilibrium",
            "weights": w_orig,
            "residual_lag1": rho1,
            "success": bool(sol["converged"]),
            "screened": bool(sol.get("screened", False)),
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
            n_used=rec.n_samples,
            settings=settings,
            param_cov=cov6,
            notes=tuple(notes),
            warnings=tuple(warns),
            extra=extra,
        )

    def _chunk(self, n: int, P: int) -> int:
        # the Jacobian, its trial copy and the expm / Frechet temporaries per replicate
        per = 8 * n * (2 * P * 3 + 60)
        return int(max(1, _CHUNK_BYTES // max(per, 1)))

    def fit_values(
        self, rec: Recording, values: np.ndarray, equilibrium: np.ndarray | None = None
    ) -> SystemBatch:
        """Refit replicate values (B, n, 2) in batched solves of bounded memory.

        When :meth:`fit` ran on a recording with the same sampling and equilibrium
        setting (the bootstrap's case), every replicate starts from that point
        estimate with its weights and units (one start, no multi-start: replicates
        stay near the point estimate), and all replicates of a chunk are one batched
        solve.  Otherwise each replicate gets the full procedure of :meth:`fit`, one
        after the other (a fallback, not the bootstrap's path).  Replicates whose fit
        fails or does not converge are returned with ``valid = False`` (never
        redrawn); :attr:`last_failures` counts them by reason.  The refits of one
        point fit share one ``time_budget`` across calls; once it is spent, the
        remaining replicates fail at once ("time budget spent").
        """
        eq = check_equilibrium(equilibrium)
        V, _ = replicate_values(rec, values)
        B = V.shape[0]
        mats = np.full((B, 2, 2), np.nan)
        offs = np.full((B, 2), np.nan)
        valid = np.zeros(B, dtype=bool)
        reasons: dict[str, int] = {}
        ref = self._reference
        use_ref = (
            ref is not None
            and ref["times"].shape == rec.times.shape
            and np.array_equal(ref["times"], rec.times)
            and np.array_equal(ref["trajectory"], rec.trajectory)
            and ((ref["eq"] is None) == (eq is None))
            and (eq is None or np.array_equal(ref["eq"], eq))
        )
        if use_ref:
            assert ref is not None
            if ref["budget"] is None:
                ref["budget"] = _Budget(self.settings["time_budget"])
            budget = ref["budget"]
        if use_ref and not ref["converged"]:
            # replicates drawn around a point that is no minimum say nothing about the
            # sampling spread (each would wander to its own minimum, mostly to the
            # iteration cap or the budget): they all fail, at once, with the reason
            reasons[_UNCONVERGED] = B
        elif use_ref:
            assert ref is not None
            # the point estimate's internal units (same times, so same time scale)
            base = self._problem(rec, np.asarray(rec.values, dtype=float), eq)
            prob = replace(
                base,
                mu=ref["mu"],
                sd=ref["sd"],
                eq=None if eq is None else (eq - ref["mu"]) / ref["sd"],
            )
            kind = ref["kind"]
            P = ref["theta"].size
            size = self._chunk(rec.n_samples, P)
            for lo in range(0, B, size):
                hi = min(B, lo + size)
                if budget.left() == 0.0:
                    # the budget is spent: the rest fail without a first evaluation
                    text = STATUS[2]
                    reasons[text] = reasons.get(text, 0) + (B - lo)
                    break
                with np.errstate(over="ignore", invalid="ignore"):
                    y = (V[lo:hi] - ref["mu"]) / ref["sd"]
                bt = _batch(prob, kind, y, ref["w"])
                theta0 = np.broadcast_to(ref["theta"], (hi - lo, P))
                fit = self._fit_batch(theta0, bt, ref["how"], budget)
                A, b = self._original_batch(fit["theta"], prob, kind)
                ok = (
                    fit["converged"]
                    & np.all(np.isfinite(A), axis=(1, 2))
                    & np.all(np.isfinite(b), axis=1)
                )
                # a model beyond double precision is no fit (as in :meth:`fit`)
                wild = ~(
                    _amplification(fit["theta"], replace(bt, w=fit["w"])) <= _MAX_AMPLIFICATION
                )
                if np.any(wild):
                    reasons[_WILD] = reasons.get(_WILD, 0) + int(wild.sum())
                    ok &= ~wild
                mats[lo:hi] = np.where(ok[:, None, None], A, np.nan)
                offs[lo:hi] = np.where(ok[:, None], b, np.nan)
                valid[lo:hi] = ok
                bad = ~ok & ~wild
                for key in np.unique(fit["status"][bad]):
                    text = STATUS[int(key)] if key else "not finite"
                    reasons[text] = reasons.get(text, 0) + int(np.sum((fit["status"] == key) & bad))
        else:
            budget = _Budget(self.settings["time_budget"])
            for r in range(B):
                try:
                    sol = self._solve(rec, V[r], eq, budget)
                except FitdynError as exc:
                    reasons[type(exc).__name__] = reasons.get(type(exc).__name__, 0) + 1
                    continue
                bt1 = _batch(sol["prob"], sol["kind"], sol["prob"].y, sol["w"])
                if not _amplification(sol["theta"][None], bt1)[0] <= _MAX_AMPLIFICATION:
                    reasons[_WILD] = reasons.get(_WILD, 0) + 1
                    continue
                if not sol["converged"]:
                    text = STATUS[sol["status"]]
                    reasons[text] = reasons.get(text, 0) + 1
                    continue
                o = self._original(sol["theta"], sol["prob"], sol["kind"])
                A, b = o["A"], o["b"]
                if np.all(np.isfinite(A)) and np.all(np.isfinite(b)):
                    mats[r], offs[r], valid[r] = A, b, True
                else:
                    reasons["not finite"] = reasons.get("not finite", 0) + 1
        self.last_failures = {
            "replicates": B,
            "did_not_converge": int(B - valid.sum()),
            "reasons": reasons,
        }
        return SystemBatch(matrix=mats, offset=offs, valid=valid)


def _beyond_precision(rec: Recording, values: np.ndarray, A: np.ndarray, amp: float) -> str:
    """Why a fit whose model amplifies rounding beyond double precision is refused."""
    with np.errstate(over="ignore", invalid="ignore"):
        re = float(np.max(linalg2.eigvals(A).real)) if np.all(np.isfinite(A)) else np.nan
        med = np.median(values, axis=0)
        dev = np.abs(values - med)
        spread = np.quantile(dev, 0.75, axis=0)
        z = dev / np.where(spread > 0, spread, np.maximum(np.max(dev, axis=0), 1e-300))
    i, j = np.unravel_index(int(np.argmax(np.where(np.isfinite(z), z, -1.0))), z.shape)
    row = int(rec.source_rows[i]) if len(rec.source_rows) == len(values) else int(i)
    return (
        f"the trajectory fit cannot be trusted on these data: its best model amplifies "
        f"rounding by a factor of {amp:.1e} over the record (largest eigenvalue real part "
        f"{re:.3g} over a span of {rec.time_span():.3g}), so it matches the samples only "
        "through digits double precision does not hold; the data look like a jump, an "
        f"outlier (the most extreme value is channel '{rec.channels[j]}' at row {row}) or "
        "more than one system: check the data, or fit a shorter, cleaner stretch"
    )


def _pretty(names: list[str]) -> list[str]:
    out = []
    for nm in names:
        if nm.startswith("x0_"):
            _, r, j = nm.split("_")
            out.append(f"starting state of trajectory {r}, channel {j}")
        elif nm.startswith("xs"):
            out.append(f"equilibrium channel {nm[2:]}")
        else:
            out.append(nm)
    return out
