"""Process and sensor noise of a fitted linear model, by maximum likelihood.

Given the drift of a fitted model ``dx = A (x - x*) dt + Q^{1/2} dW`` sampled as
``y_k = x(t_k) + v_k``, ``v_k ~ N(0, R)`` with ``R`` diagonal (independent sensors),
the samples of each gap-free segment form a linear Gaussian state-space model with
one transition per step,

    x_{k+1} - x* = F_k (x_k - x*) + w_k,   F_k = expm(A h_k),   w_k ~ N(0, W(h_k; Q)),

``W(h; Q) = int_0^h expm(A s) Q expm(A s)^T ds`` (Van Loan 1978; linear in ``Q``,
so it is precomputed once per step for a basis of ``Q``).  The exact Gaussian
log-likelihood of ``(Q, R)`` on any steps integrates the states out: their precision
given the samples is block tridiagonal, so one banded Cholesky factorisation per
parameter vector gives it in O(n) with no Python loop over the samples (see
:func:`_loglik`; it equals the Kalman filter's prediction-error decomposition, Durbin
& Koopman, *Time Series Analysis by State Space Methods*, 2nd ed., 2012, ch. 4, with
the first sample of a segment started diffusely, as in
:mod:`fitdyn.estimators.statespace`).  :func:`fit_noise` maximises it over the five
noise parameters with ``A`` and ``x*`` held at a fitted value, by L-BFGS-B with
central-difference gradients (the eleven parameter vectors of one gradient share
the step matrices).

Why not moments alone: on records where the sensor noise dominates the step
innovation, the moment estimate of ``Q`` (a difference of two nearly equal
quantities, :func:`fitdyn.bootstrap.noise_model`) is very noisy, and a parametric
bootstrap that simulates with a ``Q`` several times too small reports intervals that
are too narrow.  The likelihood uses the whole autocorrelation of the samples.

:func:`noise_log_likelihood` is the same likelihood for given noise.  Records
longer than :data:`MAX_TRANSITIONS` keep the moment estimate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fitdyn.recording import Recording

__all__ = ["NoiseFit", "fit_noise", "noise_log_likelihood", "MAX_TRANSITIONS"]

#: transitions above which fit_noise keeps the starting (moment) estimate
MAX_TRANSITIONS = 200000
_LOG2PI = float(np.log(2.0 * np.pi))
#: bounds of the log-variances in internal units (channel variance 1)
_LOG_LO, _LOG_HI = np.log(1e-8), np.log(1e3)
#: basis of symmetric Q: diag(1, 0), diag(0, 1), [[1, 1], [1, 1]] (each PSD)
_BASIS = (np.diag([1.0, 0.0]), np.diag([0.0, 1.0]), np.ones((2, 2)))


@dataclass(frozen=True)
class NoiseFit:
    """Result of :func:`fit_noise`.

    Attributes
    ----------
    process_noise : ndarray, shape (2, 2)
        Diffusion covariance rate ``Q``.
    measurement_cov : ndarray, shape (2, 2)
        Sensor covariance ``R`` (diagonal).
    log_likelihood : float
        The maximised objective (NaN when the moment estimate was kept): the exact
        log-likelihood.
    method : str
        ``"likelihood"`` or ``"moments"`` (the start, kept).
    note : str
        One line for the notes.
    """

    process_noise: np.ndarray
    measurement_cov: np.ndarray
    log_likelihood: float
    method: str
    note: str


@dataclass(frozen=True)
class _Prepared:
    """All samples in internal units, segment after segment, and the step matrices."""

    y: np.ndarray  # (N, 2) samples of the segments with at least two samples
    link: np.ndarray  # (K,) index j of each transition j -> j + 1 within a segment
    F: np.ndarray  # (K, 2, 2) transition matrices
    W: np.ndarray  # (3, K, 2, 2) step covariance of each Q basis matrix
    sd: np.ndarray  # (2,) channel spreads
    n_density: int  # transitions (samples with a density: all but each segment's first)


def _prepare(rec: Recording, A: np.ndarray, xs: np.ndarray) -> _Prepared:
    from fitdyn.simulate import discretise

    bounds = [(a, b) for a, b in rec.segment_bounds() if b - a >= 2]
    if bounds:
        rows = np.concatenate([np.arange(a, b) for a, b in bounds])
    else:
        rows = np.zeros(0, dtype=np.int64)
    lengths = np.array([b - a for a, b in bounds], dtype=np.int64)
    ends = np.cumsum(lengths) - 1
    last = np.zeros(rows.size, dtype=bool)
    last[ends] = True
    link = np.flatnonzero(~last)
    V = np.asarray(rec.values, dtype=float)
    sd = V.std(axis=0)
    sd = np.where(sd > 0, sd, 1.0)
    y = (V[rows] - xs) / sd
    t = np.asarray(rec.times, dtype=float)[rows]
    h = t[link + 1] - t[link]
    A_i = A * sd[None, :] / sd[:, None]  # S^-1 A S with S = diag(sd)
    Ws = []
    F = np.zeros((0, 2, 2))
    for E in _BASIS:
        F, C = discretise(A_i, h, E)
        Ws.append(C)
    return _Prepared(y=y, link=link, F=F, W=np.stack(Ws), sd=sd, n_density=int(link.size))


def _unpack(theta: np.ndarray) -> tuple[np.ndarray, ...]:
    """(P, 5) log-Cholesky of Q and log R -> q11, q12, q22, r1, r2 (each (P,))."""
    l11 = np.exp(theta[:, 0])
    c = theta[:, 1]
    l22 = np.exp(theta[:, 2])
    return l11 * l11, l11 * c, c * c + l22 * l22, np.exp(theta[:, 3]), np.exp(theta[:, 4])


def _theta(Q: np.ndarray, R: np.ndarray, floor: float = 1e-6) -> np.ndarray:
    l11 = np.sqrt(max(Q[0, 0], floor))
    c = Q[0, 1] / l11
    l22 = np.sqrt(max(Q[1, 1] - c * c, floor))
    return np.array(
        [np.log(l11), c, np.log(l22), np.log(max(R[0, 0], floor)), np.log(max(R[1, 1], floor))]
    )


def _loglik(prep: _Prepared, theta: np.ndarray) -> np.ndarray:
    """Log-likelihood (internal units) of parameter rows ``theta`` (P, 5).

    The states ``x_0..x_n`` of each segment and the samples are jointly Gaussian.
    Integrating the states out, with a flat prior on each segment's first state
    (the diffuse start ``x_0 | y_0 ~ N(y_0, R)``), gives

        log p = -n log(2 pi) - 1/2 [N log|R| + sum_k log|W_k| + log|H|
                                    + y' R^-1 y - b' H^-1 b]

    for ``N`` samples and ``n`` transitions, where ``H`` is the precision of the
    states given the samples: ``R^-1`` on every diagonal block plus, for each
    transition ``x_{k+1} = F_k x_k + w_k``, ``F_k' W_k^-1 F_k`` on block ``(k, k)``,
    ``W_k^-1`` on block ``(k+1, k+1)`` and ``-W_k^-1 F_k`` on block ``(k+1, k)``
    (a Gaussian Markov chain; Rue & Held, *Gaussian Markov Random Fields*, 2005,
    ch. 2, from memory), and ``b = R^-1 y``.  ``H`` is block tridiagonal: with the
    two channels of each sample interleaved it is a band of half-width 3, whose
    Cholesky factor (LAPACK ``pbtrf`` through :func:`scipy.linalg.cholesky_banded`)
    costs O(N) per parameter row with no Python loop over the samples.  This is the
    same likelihood as the Kalman filter's prediction-error decomposition
    (``tests/test_noise.py`` checks it against the dense Gaussian density).
    """
    from scipy.linalg import cho_solve_banded, cholesky_banded

    q11, q12, q22, r1, r2 = _unpack(theta)
    P = theta.shape[0]
    y = prep.y
    N = y.shape[0]
    k = prep.link
    # step covariances for these parameters: Q = (q11 - q12) E1 + (q22 - q12) E2 + q12 E3
    c = np.stack([q11 - q12, q22 - q12, q12])  # (3, P)
    W = prep.W
    w11 = c.T @ W[:, :, 0, 0]  # (P, K)
    w12 = c.T @ W[:, :, 0, 1]
    w22 = c.T @ W[:, :, 1, 1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        detw = w11 * w22 - w12 * w12
        i11, i12, i22 = w22 / detw, -w12 / detw, w11 / detw  # W^-1
        f11, f12, f21, f22 = (prep.F[None, :, i, j] for i, j in ((0, 0), (0, 1), (1, 0), (1, 1)))
        # G = W^-1 F and F' W^-1 F = F' G
        g11 = i11 * f11 + i12 * f21
        g12 = i11 * f12 + i12 * f22
        g21 = i12 * f11 + i22 * f21
        g22 = i12 * f12 + i22 * f22
        # lower band of H (P, 4, 2N): row d holds H[i + d, i]
        ab = np.zeros((P, 4, 2 * N))
        ab[:, 0, 0::2] = (1.0 / r1)[:, None]
        ab[:, 0, 1::2] = (1.0 / r2)[:, None]
        ab[:, 0, 2 * k] += f11 * g11 + f21 * g21
        ab[:, 1, 2 * k] += f11 * g12 + f21 * g22
        ab[:, 0, 2 * k + 1] += f12 * g12 + f22 * g22
        ab[:, 0, 2 * k + 2] += i11
        ab[:, 1, 2 * k + 2] += i12
        ab[:, 0, 2 * k + 3] += i22
        ab[:, 2, 2 * k] = -g11  # H[x_{k+1}(1), x_k(1)]
        ab[:, 3, 2 * k] = -g21  # H[x_{k+1}(2), x_k(1)]
        ab[:, 1, 2 * k + 1] = -g12  # H[x_{k+1}(1), x_k(2)]
        ab[:, 2, 2 * k + 1] = -g22  # H[x_{k+1}(2), x_k(2)]
        b = np.empty((P, 2 * N))
        b[:, 0::2] = y[None, :, 0] / r1[:, None]
        b[:, 1::2] = y[None, :, 1] / r2[:, None]
        yRy = np.sum(y[:, 0] ** 2) / r1 + np.sum(y[:, 1] ** 2) / r2
        base = N * np.log(r1 * r2) + np.sum(np.log(detw), axis=1) + yRy
    ll = np.full(P, -np.inf)
    for p in range(P):  # the parameter rows of one gradient (at most 11), not samples
        if not (np.isfinite(base[p]) and np.all(detw[p] > 0) and np.all(np.isfinite(ab[p]))):
            continue
        try:
            L = cholesky_banded(ab[p], lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            continue
        z = cho_solve_banded((L, True), b[p], check_finite=False)
        logdet = 2.0 * np.sum(np.log(L[0]))
        ll[p] = -0.5 * (base[p] + logdet - b[p] @ z) - prep.n_density * _LOG2PI
    return np.where(np.isfinite(ll), ll, -np.inf)


def _to_original(theta: np.ndarray, sd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    q11, q12, q22, r1, r2 = (float(v[0]) for v in _unpack(theta[None]))
    Sc = np.outer(sd, sd)
    Q = np.array([[q11, q12], [q12, q22]]) * Sc
    R = np.diag([r1, r2]) * sd * sd
    return Q, R


def noise_log_likelihood(
    rec: Recording, matrix: np.ndarray, equilibrium: np.ndarray, Q: np.ndarray, R: np.ndarray
) -> float:
    """Exact Gaussian log-likelihood of the samples for given noise (original units).

    Parameters
    ----------
    rec : Recording
    matrix, equilibrium : ndarray, shapes (2, 2) and (2,)
        The drift ``A`` and ``x*``.
    Q : ndarray, shape (2, 2)
        Diffusion covariance rate.
    R : ndarray, shape (2, 2)
        Sensor covariance (only its diagonal is used).

    Returns
    -------
    float
        Conditional on each segment's first sample (diffuse start).
    """
    prep = _prepare(rec, np.asarray(matrix, float), np.asarray(equilibrium, float))
    sd = prep.sd
    Qi = np.asarray(Q, float) / np.outer(sd, sd)
    Ri = np.diag(np.diag(np.asarray(R, float))) / np.outer(sd, sd)
    ll = _loglik(prep, _theta(Qi, Ri, floor=1e-300)[None])[0]
    return float(ll - prep.n_density * np.sum(np.log(sd)))


def fit_noise(
    rec: Recording,
    matrix: np.ndarray,
    equilibrium: np.ndarray,
    start: tuple[np.ndarray, np.ndarray],
    max_iterations: int = 200,
) -> NoiseFit:
    """Maximum-likelihood ``Q`` and diagonal ``R`` with the drift held fixed.

    Parameters
    ----------
    rec : Recording
    matrix, equilibrium : ndarray, shapes (2, 2) and (2,)
        The fitted drift ``A`` and ``x*``.
    start : (Q, R)
        Starting values (e.g. by moments); kept when the record has more than
        :data:`MAX_TRANSITIONS` transitions or the optimisation fails.
    max_iterations : int
        L-BFGS-B iteration cap.

    Returns
    -------
    NoiseFit
    """
    from scipy.optimize import minimize

    Q0 = np.asarray(start[0], dtype=float)
    R0 = np.diag(np.diag(np.asarray(start[1], dtype=float)))
    n_trans = sum(b - a - 1 for a, b in rec.segment_bounds() if b - a >= 2)

    def kept(why: str) -> NoiseFit:
        return NoiseFit(Q0, R0, float("nan"), "moments", f"noise by moments ({why})")

    if n_trans < 8:
        return kept("too few transitions for the likelihood")
    if n_trans > MAX_TRANSITIONS:
        return kept(f"more than {MAX_TRANSITIONS} transitions: the likelihood is not run")
    A = np.asarray(matrix, dtype=float)
    xs = np.asarray(equilibrium, dtype=float)
    if not (np.all(np.isfinite(A)) and np.all(np.isfinite(xs))):
        return kept("no finite drift")
    prep = _prepare(rec, A, xs)
    sd = prep.sd
    Qi = Q0 / np.outer(sd, sd)
    Ri = R0 / np.outer(sd, sd)
    # floors: a start at zero noise has no gradient in log-variances
    floor = 1e-4
    th0 = _theta(Qi + floor * np.eye(2), Ri + floor * np.eye(2), floor)
    eps = 1e-5
    steps = np.vstack([np.zeros(5), eps * np.eye(5), -eps * np.eye(5)])

    def fun(th: np.ndarray) -> tuple[float, np.ndarray]:
        ll = _loglik(prep, th[None] + steps)
        if not np.all(np.isfinite(ll)):
            return float("inf") if not np.isfinite(ll[0]) else -float(ll[0]), np.zeros(5)
        grad = (ll[1:6] - ll[6:11]) / (2 * eps)
        return -float(ll[0]), -grad

    lo = np.array([0.5 * _LOG_LO, -1e3, 0.5 * _LOG_LO, _LOG_LO, _LOG_LO])
    hi = np.array([0.5 * _LOG_HI, 1e3, 0.5 * _LOG_HI, _LOG_HI, _LOG_HI])
    th0 = np.clip(th0, lo, hi)
    f0, _ = fun(th0)
    if not np.isfinite(f0):
        return kept("the likelihood is not finite at the start")
    res = minimize(
        fun,
        th0,
        jac=True,
        method="L-BFGS-B",
        bounds=list(zip(lo, hi, strict=True)),
        options={"maxiter": int(max_iterations)},
    )
    if not np.isfinite(res.fun) or res.fun > f0:
        return kept("the likelihood search failed")
    Q, R = _to_original(res.x, sd)
    ll = -float(res.fun) - prep.n_density * float(np.sum(np.log(sd)))
    note = (
        "noise by maximum likelihood (exact Gaussian likelihood on the actual steps, "
        f"drift held at the estimate): Q = {np.round(Q, 6).tolist()}, "
        f"R = {np.round(R, 6).tolist()}"
        + ("" if res.success else f" (search stopped: {res.message})")
    )
    return NoiseFit(Q, R, ll, "likelihood", note)
