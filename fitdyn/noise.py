"""Process and sensor noise of a fitted linear model, by maximum likelihood.

Given the drift of a fitted model ``dx = A (x - x*) dt + Q^{1/2} dW`` sampled as
``y_k = x(t_k) + v_k``, ``v_k ~ N(0, R)`` with ``R`` diagonal (independent sensors),
the samples of each gap-free segment form a linear Gaussian state-space model with
one transition per step,

    x_{k+1} - x* = F_k (x_k - x*) + w_k,   F_k = expm(A h_k),   w_k ~ N(0, W(h_k; Q)),

``W(h; Q) = int_0^h expm(A s) Q expm(A s)^T ds`` (Van Loan 1978; linear in ``Q``,
so it is precomputed once per step for a basis of ``Q``).  The Kalman filter gives
the exact Gaussian log-likelihood of ``(Q, R)`` on any steps (Durbin & Koopman,
*Time Series Analysis by State Space Methods*, 2nd ed., 2012, ch. 4; the first
sample of a segment starts the filter diffusely, as in
:mod:`fitdyn.estimators.statespace`).  :func:`fit_noise` maximises it over the five
noise parameters with ``A`` and ``x*`` held at a fitted value, by L-BFGS-B with
central-difference gradients; all the parameter vectors a gradient needs go through
one filter pass as a batch.

Why not moments alone: on records where the sensor noise dominates the step
innovation, the moment estimate of ``Q`` (a difference of two nearly equal
quantities, :func:`fitdyn.bootstrap.noise_model`) is very noisy, and a parametric
bootstrap that simulates with a ``Q`` several times too small reports intervals that
are too narrow.  The likelihood uses the whole autocorrelation of the samples.

The filter runs a Python loop over the time steps, with the segments and the
parameter vectors as the batch, so its cost grows with the longest segment.  To
bound it, :func:`fit_noise` cuts segments longer than :data:`PIECE` samples into
pieces that overlap by one sample and treats the pieces as independent lanes, each
started diffusely at its first sample: the objective is then the product of the
exact likelihoods of the pieces, each conditional on its first sample -- a
composite likelihood (Lindsay, Contemp. Math. 80, 1988, from memory), still
consistent, which gives up one sample's worth of information per piece (under
1 %).
:func:`noise_log_likelihood` is the exact, uncut likelihood.  Records longer than
:data:`MAX_TRANSITIONS` keep the moment estimate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fitdyn.recording import Recording

__all__ = ["NoiseFit", "fit_noise", "noise_log_likelihood", "MAX_TRANSITIONS"]

#: transitions above which fit_noise keeps the starting (moment) estimate
MAX_TRANSITIONS = 200000
#: samples per piece of a long segment in the fit (see the module notes)
PIECE = 400
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
        log-likelihood, or the composite one when long segments were cut.
    method : str
        ``"likelihood"`` or ``"moments"`` (the start, kept).
    note : str
        One line for the notes.
    composite : bool
        Whether long segments were cut into pieces (:data:`PIECE`).
    """

    process_noise: np.ndarray
    measurement_cov: np.ndarray
    log_likelihood: float
    method: str
    note: str
    composite: bool


@dataclass(frozen=True)
class _Prepared:
    """Lanes (one per segment) in internal units, and the per-step matrices."""

    y1: np.ndarray  # (T, S)
    y2: np.ndarray  # (T, S)
    mask: np.ndarray  # (T, S) sample present
    F: np.ndarray  # (T, S, 2, 2) transition into sample k (identity at k = 0 / padding)
    W: np.ndarray  # (3, T, S, 2, 2) step covariance of each Q basis matrix
    sd: np.ndarray  # (2,) channel spreads
    n_density: int  # samples with a density (all but each segment's first)


def _pieces(rec: Recording, piece: int | None) -> list[tuple[int, int]]:
    """Sample ranges ``[a, b)`` of the segments, long ones cut into overlapping pieces.

    Consecutive pieces share one sample (the last of one is the first of the next),
    so no transition is lost.
    """
    out = []
    for a, b in rec.segment_bounds():
        if b - a < 2:
            continue
        if piece is None or b - a <= piece:
            out.append((a, b))
            continue
        n_pieces = int(np.ceil((b - a - 1) / (piece - 1)))
        cuts = np.linspace(a, b - 1, n_pieces + 1).round().astype(int)
        out.extend((int(cuts[i]), int(cuts[i + 1]) + 1) for i in range(n_pieces))
    return out


def _prepare(rec: Recording, A: np.ndarray, xs: np.ndarray, piece: int | None = None) -> _Prepared:
    from fitdyn.simulate import discretise

    bounds = _pieces(rec, piece)
    starts = np.array([a for a, _ in bounds], dtype=np.int64)
    lengths = np.array([b - a for a, b in bounds], dtype=np.int64)
    T = int(lengths.max())
    k = np.arange(T)[:, None]
    mask = k < lengths[None, :]
    index = starts[None, :] + np.minimum(k, lengths[None, :] - 1)
    V = np.asarray(rec.values, dtype=float)
    sd = V.std(axis=0)
    sd = np.where(sd > 0, sd, 1.0)
    U = (V - xs) / sd
    t = np.asarray(rec.times, dtype=float)
    h = np.zeros((T, mask.shape[1]))
    h[1:] = np.where(mask[1:], t[index[1:]] - t[index[:-1]], 0.0)
    A_i = A * sd[None, :] / sd[:, None]  # S^-1 A S with S = diag(sd)
    flat = h.reshape(-1)
    Ws = []
    F = None
    for E in _BASIS:
        F_, C = discretise(A_i, flat, E)
        F = F_ if F is None else F
        Ws.append(C.reshape(T, -1, 2, 2))
    assert F is not None
    y = np.where(mask[..., None], U[index], 0.0)
    return _Prepared(
        y1=y[..., 0],
        y2=y[..., 1],
        mask=mask,
        F=F.reshape(T, -1, 2, 2),
        W=np.stack(Ws),
        sd=sd,
        n_density=int((lengths - 1).sum()),
    )


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

    Everything that does not depend on the filter's state (transition entries, step
    covariances for these parameters) is formed for all steps before the loop, which
    then does only the recursion, in scalar 2x2 arithmetic on (P, S) arrays.
    """
    q11, q12, q22, r1, r2 = (v[:, None] for v in _unpack(theta))
    # Q in the basis diag(1,0), diag(0,1), ones: weights q11 - q12, q22 - q12, q12
    c = np.stack([q11 - q12, q22 - q12, q12])  # (3, P, 1)
    W = prep.W  # (3, T, S, 2, 2)
    w11 = np.einsum("jps,jts->tps", c, W[..., 0, 0])
    w12 = np.einsum("jps,jts->tps", c, W[..., 0, 1])
    w22 = np.einsum("jps,jts->tps", c, W[..., 1, 1])
    F = prep.F
    f11, f12, f21, f22 = (F[:, None, :, i, j] for i, j in ((0, 0), (0, 1), (1, 0), (1, 1)))
    y1, y2 = prep.y1[:, None, :], prep.y2[:, None, :]
    mask = prep.mask[:, None, :]
    P = theta.shape[0]
    S = prep.y1.shape[1]
    # diffuse start: the filtered first state is the first sample, covariance R
    m1 = np.broadcast_to(y1[0], (P, S))
    m2 = np.broadcast_to(y2[0], (P, S))
    p11 = np.broadcast_to(r1, (P, S))
    p12 = np.zeros((P, S))
    p22 = np.broadcast_to(r2, (P, S))
    terms = np.zeros((P, S))
    for k in range(1, prep.y1.shape[0]):
        a11, a12, a21, a22 = f11[k], f12[k], f21[k], f22[k]
        # predict
        x1 = a11 * m1 + a12 * m2
        x2 = a21 * m1 + a22 * m2
        t11 = a11 * p11 + a12 * p12
        t12 = a11 * p12 + a12 * p22
        t21 = a21 * p11 + a22 * p12
        t22 = a21 * p12 + a22 * p22
        b11 = t11 * a11 + t12 * a12 + w11[k]
        b12 = t11 * a21 + t12 * a22 + w12[k]
        b22 = t21 * a21 + t22 * a22 + w22[k]
        # innovation and its covariance
        e1 = y1[k] - x1
        e2 = y2[k] - x2
        s11 = b11 + r1
        s22 = b22 + r2
        det = s11 * s22 - b12 * b12
        i11 = s22 / det
        i12 = -b12 / det
        i22 = s11 / det
        g1 = i11 * e1 + i12 * e2
        g2 = i12 * e1 + i22 * e2
        mk = mask[k]
        terms += np.where(mk, np.log(det) + e1 * g1 + e2 * g2, 0.0)
        # update: m + P S^-1 e, and P_{k|k} = P_{k|k-1} S^-1 R (no cancellation)
        m1 = np.where(mk, x1 + b11 * g1 + b12 * g2, m1)
        m2 = np.where(mk, x2 + b12 * g1 + b22 * g2, m2)
        k11 = b11 * i11 + b12 * i12
        k12 = b11 * i12 + b12 * i22
        k22 = b12 * i12 + b22 * i22
        p11 = np.where(mk, k11 * r1, p11)
        p12 = np.where(mk, 0.5 * (k12 * r2 + (b12 * i11 + b22 * i12) * r1), p12)
        p22 = np.where(mk, k22 * r2, p22)
    ll = -0.5 * np.sum(terms, axis=1) - prep.n_density * _LOG2PI
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
        return NoiseFit(Q0, R0, float("nan"), "moments", f"noise by moments ({why})", False)

    if n_trans < 8:
        return kept("too few transitions for the likelihood")
    if n_trans > MAX_TRANSITIONS:
        return kept(f"more than {MAX_TRANSITIONS} transitions: the likelihood is not run")
    A = np.asarray(matrix, dtype=float)
    xs = np.asarray(equilibrium, dtype=float)
    if not (np.all(np.isfinite(A)) and np.all(np.isfinite(xs))):
        return kept("no finite drift")
    prep = _prepare(rec, A, xs, PIECE)
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
    composite = len(_pieces(rec, PIECE)) > len(_pieces(rec, None))
    how = "; long segments in pieces, composite likelihood" if composite else ""
    note = (
        "noise by maximum likelihood (Kalman filter on the actual steps, drift held at "
        f"the estimate{how}): Q = {np.round(Q, 6).tolist()}, R = {np.round(R, 6).tolist()}"
        + ("" if res.success else f" (search stopped: {res.message})")
    )
    return NoiseFit(Q, R, ll, "likelihood", note, composite)
