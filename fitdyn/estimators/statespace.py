"""State-space fit: Kalman-filter likelihood maximised by the EM algorithm.

When a recording carries both process noise and measurement noise the sampled state
is latent.  Over one uniform step ``h`` the model is the linear Gaussian state-space
model

    x_{k+1} = F x_k + g + w_k,    w_k ~ N(0, Qd),
    y_k     = x_k + v_k,          v_k ~ N(0, R),   R diagonal,

with ``F = expm(A h)``, ``g = (int_0^h expm(A s) ds) b`` and ``Qd = int_0^h expm(A s)
Q expm(A s)^T ds``.  ``R`` is diagonal: the two sensors' errors are assumed
independent of each other (correlated sensor errors are not identified separately
from correlated process noise in this model without further information).

Estimation
----------
* **Likelihood.**  The Kalman filter gives the one-step innovations and their
  covariances, hence the Gaussian log-likelihood (Durbin & Koopman, *Time Series
  Analysis by State Space Methods*, 2nd ed., 2012, ch. 4 and 7).
* **Initial state.**  Each gap-free segment starts afresh with an exact diffuse
  initialisation (a flat prior on its first state; Durbin & Koopman 2012, ch. 5):
  because every channel is observed, the filtered first state is the first
  observation with covariance ``R``, and the likelihood is that of the later
  samples given the first.  The constant ``-log(2 pi)`` of each first sample is
  included, as in statsmodels' exact diffuse filter.  Segments of a single sample
  carry no information about the dynamics and are left out (the notes say so).
* **EM.**  E-step: the filter and the Rauch-Tung-Striebel smoother with lag-one
  covariances ``Cov(x_{k+1}, x_k | all data) = P_{k+1|N} J_k^T``; M-step: the closed
  forms of Shumway & Stoffer (J. Time Ser. Anal. 3, 1982) for ``F``, ``g``, ``Qd``
  and the diagonal ``R`` (Shumway & Stoffer, *Time Series Analysis and Its
  Applications*, 4th ed., 2017, sec. 6.3).  With a known equilibrium the data are
  taken relative to it and no intercept is fitted (``g = 0``).
* **Acceleration.**  SQUAREM (scheme S3 of Varadhan & Roland, Scand. J. Stat. 35,
  2008) on the parameter vector ``(F, g, log-Cholesky of Qd, log R)``: two EM steps,
  a squared extrapolation, one stabilising EM step; when the extrapolated point
  lowers the likelihood below that after the first EM step, the plain second EM
  step is kept instead, so the likelihood never decreases.
* **Convergence.**  Per replicate: the Euclidean change of the parameter vector (in
  internal units) over one cycle is below ``tol``; at most ``max_iter`` EM steps.
  Variances are bounded below by ``1e-10`` times the channel variance (a variance
  there is reported as "at the zero boundary").
* **Start.**  One-step least squares (the discrete estimator's regression), and
  the noise from moments of its residuals: for ``r_k = x_{k+1} - F x_k - g``,
  ``Cov(r_{k+1}, r_k) = -F R`` and ``Cov(r_k) = Qd + R + F R F^T`` (the equations of
  :func:`fitdyn.bootstrap.noise_model`, in their discrete form, batched and usable
  without a real logarithm of the least-squares ``F``).
* **Internal units.**  Each channel is centred (at its mean, or at the known
  equilibrium) and divided by its standard deviation; results are mapped back
  exactly, so rescaling a channel changes nothing.

Then ``A = log(F) / h`` and ``b`` follow from :func:`system_from_one_step` (refused
when ``F`` has no real logarithm, as in the discrete estimator) and the diffusion
``Q`` from ``Qd`` by inverting the linear Van Loan map ``Q -> int_0^h e^{As} Q
e^{A^T s} ds`` (:func:`fitdyn.bootstrap._step_covariance`).

Everything runs over a leading replicate axis with 2x2 closed forms: the point
estimate is the one-replicate case of the batched EM that :meth:`fit_values` runs
for all bootstrap replicates at once (chunked to bound memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar, NamedTuple

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import (
    EstimationError,
    NoRealLogarithmError,
    SamplingError,
    TooFewSamplesError,
)
from fitdyn.estimators.base import (
    Estimate,
    NonlinearEstimator,
    SystemBatch,
    lstsq,
)
from fitdyn.estimators.discrete import (
    ALIASING_LIMIT,
    DiscreteEstimator,
    one_step_pairs,
    system_from_one_step,
)
from fitdyn.recording import Recording

__all__ = ["KalmanEstimator", "diffusion_from_step", "log_likelihood", "smooth"]

#: variance floor in internal units (a fraction of each channel's variance)
FLOOR = 1e-10
_LOG_FLOOR = float(np.log(FLOOR))
_LOG2PI = float(np.log(2.0 * np.pi))
#: variances (internal units) below which a fall towards zero triggers a boundary move
SNAP = 1e-3
#: factor by which the SQUAREM step-length bound grows or shrinks (Varadhan & Roland's
#: reference implementation uses 4, from memory)
_STEP_GROWTH = 4.0
#: memory budget of one batched E-step (bytes); replicates are processed in chunks
CHUNK_BYTES = 64 * 2**20


# ==================================================================================
# parameters: per-component (B,) arrays
# ==================================================================================
class _Params(NamedTuple):
    """One-step model parameters, each of shape (B,), in internal units."""

    f11: np.ndarray
    f12: np.ndarray
    f21: np.ndarray
    f22: np.ndarray
    g1: np.ndarray
    g2: np.ndarray
    q11: np.ndarray
    q12: np.ndarray
    q22: np.ndarray
    r1: np.ndarray
    r2: np.ndarray


def _n_theta(intercept: bool) -> int:
    return 11 if intercept else 9


def _to_theta(p: _Params, intercept: bool) -> np.ndarray:
    """Parameter vectors (B, k): F, [g], log-Cholesky of Qd, log R."""
    l11 = np.sqrt(np.maximum(p.q11, FLOOR))
    c = p.q12 / l11
    l22sq = np.maximum(p.q22 - c * c, FLOOR)
    cols = [p.f11, p.f12, p.f21, p.f22]
    if intercept:
        cols += [p.g1, p.g2]
    cols += [
        np.log(l11),
        c,
        0.5 * np.log(l22sq),
        np.log(np.maximum(p.r1, FLOOR)),
        np.log(np.maximum(p.r2, FLOOR)),
    ]
    return np.stack(cols, axis=1)


def _clip_theta(th: np.ndarray, intercept: bool) -> np.ndarray:
    """Variances bounded below by the floor."""
    th = th.copy()
    j = 6 if intercept else 4
    th[:, j] = np.maximum(th[:, j], 0.5 * _LOG_FLOOR)
    th[:, j + 2] = np.maximum(th[:, j + 2], 0.5 * _LOG_FLOOR)
    th[:, j + 3 :] = np.maximum(th[:, j + 3 :], _LOG_FLOOR)
    return th


def _from_theta(th: np.ndarray, intercept: bool) -> _Params:
    B = th.shape[0]
    if intercept:
        f11, f12, f21, f22, g1, g2, a, c, d, lr1, lr2 = th.T
    else:
        f11, f12, f21, f22, a, c, d, lr1, lr2 = th.T
        g1 = g2 = np.zeros(B)
    l11 = np.exp(a)
    l22 = np.exp(d)
    with np.errstate(over="ignore", invalid="ignore"):
        return _Params(
            f11, f12, f21, f22, g1, g2,
            l11 * l11, l11 * c, c * c + l22 * l22,
            np.exp(lr1), np.exp(lr2),
        )  # fmt: skip


# ==================================================================================
# data layout: segments as lanes, time as the leading axis
# ==================================================================================
@dataclass(frozen=True)
class _Layout:
    """Gap-free segments (of two or more samples) arranged as padded lanes.

    Time ``k`` within a segment is the leading axis of every array, segments the
    last: step ``k`` of segment ``s`` is sample ``index[k, s]`` where ``mask[k, s]``.
    """

    starts: np.ndarray  # (S,) first sample of each segment
    lengths: np.ndarray  # (S,)
    index: np.ndarray  # (T, S) sample index (clipped inside the segment)
    mask: np.ndarray  # (T, S) k < n_s
    ulen: np.ndarray  # (U,) distinct segment lengths
    u_of: np.ndarray  # (S,) which distinct length
    count: np.ndarray  # (U,) segments of each length
    dropped: int  # single-sample segments left out

    @property
    def T(self) -> int:
        return int(self.index.shape[0])

    @property
    def S(self) -> int:
        return int(self.index.shape[1])

    @property
    def n_obs(self) -> int:
        return int(self.lengths.sum())

    @property
    def n_trans(self) -> int:
        return int((self.lengths - 1).sum())

    @property
    def ragged(self) -> bool:
        return self.ulen.size > 1

    def innovation_rows(self) -> tuple[np.ndarray, np.ndarray]:
        """(k, s) of every innovation (k >= 1), in sample order."""
        ks, ss = [], []
        for s, n in enumerate(self.lengths.tolist()):
            ks.append(np.arange(1, n))
            ss.append(np.full(n - 1, s))
        return np.concatenate(ks), np.concatenate(ss)


def _layout(rec: Recording) -> _Layout:
    bounds = [(a, b) for a, b in rec.segment_bounds() if b - a >= 2]
    dropped = sum(1 for a, b in rec.segment_bounds() if b - a < 2)
    starts = np.array([a for a, _ in bounds], dtype=np.int64)
    lengths = np.array([b - a for a, b in bounds], dtype=np.int64)
    T = int(lengths.max())
    k = np.arange(T)[:, None]
    mask = k < lengths[None, :]
    index = starts[None, :] + np.minimum(k, lengths[None, :] - 1)
    ulen, u_of, count = np.unique(lengths, return_inverse=True, return_counts=True)
    return _Layout(starts, lengths, index, mask, ulen, u_of.reshape(-1), count, dropped)


def _lanes(lay: _Layout, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Internal-unit values (B, n, 2) -> two (T, B, S) arrays (zero where padded)."""
    y = np.moveaxis(z[:, lay.index, :], 0, 2)  # (T, S, B, 2)
    y = np.swapaxes(y, 1, 2)  # (T, B, S, 2)
    if lay.ragged:
        y = np.where(lay.mask[:, None, :, None], y, 0.0)
    return np.ascontiguousarray(y[..., 0]), np.ascontiguousarray(y[..., 1])


# ==================================================================================
# E-step: filter, smoother, sufficient statistics
# ==================================================================================
def _forward_cov(p: _Params, T: int, init_P: tuple | None):
    """Covariance recursion of the filter (shared by all segments of a replicate).

    Returns predicted covariances ``Pp`` (3, T, B) (``Pp[:, 0]`` only with a known
    initial covariance), filtered ``Pf`` (3, T, B), gains ``K`` (4, T, B) and the
    innovation covariances ``S`` (3, T, B).
    """
    B = p.f11.shape[0]
    f11, f12, f21, f22 = p.f11, p.f12, p.f21, p.f22
    q11, q12, q22, r1, r2 = p.q11, p.q12, p.q22, p.r1, p.r2
    Pp = np.empty((3, T, B))
    Pf = np.empty((3, T, B))
    K = np.empty((4, T, B))
    S = np.empty((3, T, B))
    if init_P is None:  # exact diffuse start: x_{0|0} = y_0, P_{0|0} = R
        Pp[:, 0] = np.nan
        S[:, 0] = np.nan
        K[:, 0] = np.array([1.0, 0.0, 0.0, 1.0])[:, None]
        Pf[0, 0], Pf[1, 0], Pf[2, 0] = r1, 0.0, r2
        k0 = 1
    else:
        k0 = 0
    for k in range(k0, T):
        if k == 0:
            p11, p12, p22 = (np.broadcast_to(v, (B,)) for v in init_P)
        else:
            a, b, c = Pf[0, k - 1], Pf[1, k - 1], Pf[2, k - 1]
            t11 = f11 * a + f12 * b
            t12 = f11 * b + f12 * c
            t21 = f21 * a + f22 * b
            t22 = f21 * b + f22 * c
            p11 = t11 * f11 + t12 * f12 + q11
            p12 = t11 * f21 + t12 * f22 + q12
            p22 = t21 * f21 + t22 * f22 + q22
        s11 = p11 + r1
        s22 = p22 + r2
        det = s11 * s22 - p12 * p12
        i11 = s22 / det
        i12 = -p12 / det
        i22 = s11 / det
        k11 = p11 * i11 + p12 * i12
        k12 = p11 * i12 + p12 * i22
        k21 = p12 * i11 + p22 * i12
        k22 = p12 * i12 + p22 * i22
        Pp[0, k], Pp[1, k], Pp[2, k] = p11, p12, p22
        S[0, k], S[1, k], S[2, k] = s11, p12, s22
        K[0, k], K[1, k], K[2, k], K[3, k] = k11, k12, k21, k22
        # P_{k|k} = P_{k|k-1} S^{-1} R = K R (no cancellation when R is small)
        Pf[0, k] = k11 * r1
        Pf[1, k] = 0.5 * (k12 * r2 + k21 * r1)
        Pf[2, k] = k22 * r2
    return Pp, Pf, K, S


def _estep(
    p: _Params,
    y1: np.ndarray,
    y2: np.ndarray,
    lay: _Layout,
    smooth: bool = True,
    init: tuple | None = None,
) -> dict[str, Any]:
    """Filter (and smoother) for every replicate; log-likelihood (B,) and statistics.

    Parameters
    ----------
    p : _Params
        Parameters (B,) per component.
    y1, y2 : ndarray, shape (T, B, S)
        Observations of the two channels in lanes.
    lay : _Layout
    smooth : bool
        Also run the smoother and form the M-step sums.
    init : (m1, m2, P11, P12, P22) or None
        Known initial state mean (each (B, S) or scalar) and covariance (each (B,)
        or scalar) of every segment; ``None``: exact diffuse start.
    """
    T, B, S = y1.shape
    f11, f12, f21, f22, g1, g2 = p.f11, p.f12, p.f21, p.f22, p.g1, p.g2
    Pp, Pf, K, Sc = _forward_cov(p, T, None if init is None else init[2:])
    k11, k12, k21, k22 = K
    # filtered means: x_{k|k} = (I - K_k) F x_{k-1|k-1} + (I - K_k) g + K_k y_k
    m11 = (1.0 - k11) * f11[None] - k12 * f21[None]
    m12 = (1.0 - k11) * f12[None] - k12 * f22[None]
    m21 = -k21 * f11[None] + (1.0 - k22) * f21[None]
    m22 = -k21 * f12[None] + (1.0 - k22) * f22[None]
    h1 = (1.0 - k11) * g1[None] - k12 * g2[None]
    h2 = -k21 * g1[None] + (1.0 - k22) * g2[None]
    c1 = h1[..., None] + k11[..., None] * y1 + k12[..., None] * y2
    c2 = h2[..., None] + k21[..., None] * y1 + k22[..., None] * y2
    xf1 = np.empty((T, B, S))
    xf2 = np.empty((T, B, S))
    if init is None:
        xf1[0], xf2[0] = y1[0], y2[0]
    else:
        a1 = np.broadcast_to(init[0], (B, S))
        a2 = np.broadcast_to(init[1], (B, S))
        xf1[0] = a1 + k11[0, :, None] * (y1[0] - a1) + k12[0, :, None] * (y2[0] - a2)
        xf2[0] = a2 + k21[0, :, None] * (y1[0] - a1) + k22[0, :, None] * (y2[0] - a2)
    M11, M12, M21, M22 = (m[..., None] for m in (m11, m12, m21, m22))
    ragged = lay.ragged
    for k in range(1, T):
        u1, u2 = xf1[k - 1], xf2[k - 1]
        n1 = M11[k] * u1 + M12[k] * u2 + c1[k]
        n2 = M21[k] * u1 + M22[k] * u2 + c2[k]
        if ragged:  # ended segments keep their last state (never used)
            alive = lay.mask[k]
            n1 = np.where(alive, n1, u1)
            n2 = np.where(alive, n2, u2)
        xf1[k], xf2[k] = n1, n2
    # predictions and innovations, k >= 1
    F11, F12, F21, F22, G1, G2 = (v[None, :, None] for v in (f11, f12, f21, f22, g1, g2))
    xp1 = np.empty((T, B, S))
    xp2 = np.empty((T, B, S))
    xp1[1:] = F11 * xf1[:-1] + F12 * xf2[:-1] + G1
    xp2[1:] = F21 * xf1[:-1] + F22 * xf2[:-1] + G2
    if init is None:
        xp1[0], xp2[0] = y1[0], y2[0]
    else:
        xp1[0] = np.broadcast_to(init[0], (B, S))
        xp2[0] = np.broadcast_to(init[1], (B, S))
    e1 = y1 - xp1
    e2 = y2 - xp2
    k0 = 0 if init is not None else 1
    s11, s12, s22 = Sc[:, k0:]
    det = s11 * s22 - s12 * s12
    i11, i12, i22 = s22 / det, -s12 / det, s11 / det
    E1, E2 = e1[k0:], e2[k0:]
    quad = E1 * (i11[..., None] * E1 + i12[..., None] * E2) + E2 * (
        i12[..., None] * E1 + i22[..., None] * E2
    )
    maskf = lay.mask.astype(float)  # (T, S)
    alive_n = maskf.sum(axis=1)  # (T,)
    ll = (
        -0.5
        * (
            np.einsum("t,tb->b", alive_n[k0:], np.log(det))
            + np.einsum("ts,tbs->b", maskf[k0:], quad)
        )
        - lay.n_obs * _LOG2PI
    )
    out: dict[str, Any] = {"loglik": ll, "e1": e1, "e2": e2, "xf1": xf1, "xf2": xf2}
    if not smooth:
        return out

    # -- Rauch-Tung-Striebel smoother -------------------------------------------------
    # J_k = P_{k|k} F^T P_{k+1|k}^{-1}, k = 0 .. T-2 (shared by every segment)
    a, b, c = Pf[:, :-1]
    p11, p12, p22 = Pp[:, 1:]
    dp = p11 * p22 - p12 * p12
    w11, w12, w22 = p22 / dp, -p12 / dp, p11 / dp  # P_{k+1|k}^{-1}
    f11_, f12_, f21_, f22_ = (v[None] for v in (f11, f12, f21, f22))
    # P F^T
    u11 = a * f11_ + b * f12_
    u12 = a * f21_ + b * f22_
    u21 = b * f11_ + c * f12_
    u22 = b * f21_ + c * f22_
    j11 = u11 * w11 + u12 * w12
    j12 = u11 * w12 + u12 * w22
    j21 = u21 * w11 + u22 * w12
    j22 = u21 * w12 + u22 * w22
    J11, J12, J21, J22 = (v[..., None] for v in (j11, j12, j21, j22))
    # x_{k|N} = x_{k|k} + J_k (x_{k+1|N} - x_{k+1|k}) = d_k + J_k x_{k+1|N}
    d1 = xf1[:-1] - (J11 * xp1[1:] + J12 * xp2[1:])
    d2 = xf2[:-1] - (J21 * xp1[1:] + J22 * xp2[1:])
    xs1 = np.empty((T, B, S))
    xs2 = np.empty((T, B, S))
    xs1[T - 1], xs2[T - 1] = xf1[T - 1], xf2[T - 1]
    nxt = lay.mask[1:]  # (T-1, S): k + 1 < n_s
    for k in range(T - 2, -1, -1):
        v1, v2 = xs1[k + 1], xs2[k + 1]
        n1 = d1[k] + J11[k] * v1 + J12[k] * v2
        n2 = d2[k] + J21[k] * v1 + J22[k] * v2
        if ragged:
            go = nxt[k]
            n1 = np.where(go, n1, xf1[k])
            n2 = np.where(go, n2, xf2[k])
        xs1[k], xs2[k] = n1, n2
    # smoothed covariances, one backward pass per distinct segment length (B, U)
    U = lay.ulen.size
    Ps = np.empty((3, T, B, U))
    Ps[:] = Pf[:, :, :, None]
    go_u = np.arange(T - 1)[:, None] < (lay.ulen[None, :] - 1)  # (T-1, U)
    for k in range(T - 2, -1, -1):
        d11 = Ps[0, k + 1] - p11[k][:, None]
        d12 = Ps[1, k + 1] - p12[k][:, None]
        d22 = Ps[2, k + 1] - p22[k][:, None]
        a1, a2, a3, a4 = j11[k][:, None], j12[k][:, None], j21[k][:, None], j22[k][:, None]
        # J D J^T
        t11 = a1 * d11 + a2 * d12
        t12 = a1 * d12 + a2 * d22
        t21 = a3 * d11 + a4 * d12
        t22 = a3 * d12 + a4 * d22
        n11 = Ps[0, k] + t11 * a1 + t12 * a2
        n12 = Ps[1, k] + t11 * a3 + t12 * a4
        n22 = Ps[2, k] + t21 * a3 + t22 * a4
        if U > 1:
            g = go_u[k]
            n11 = np.where(g, n11, Ps[0, k])
            n12 = np.where(g, n12, Ps[1, k])
            n22 = np.where(g, n22, Ps[2, k])
        Ps[0, k], Ps[1, k], Ps[2, k] = n11, n12, n22
    # lag-one covariances Cov(x_k, x_{k-1} | N) = P_{k|N} J_{k-1}^T, k >= 1
    ps11, ps12, ps22 = Ps[:, 1:]
    b1, b2, b3, b4 = j11[..., None], j12[..., None], j21[..., None], j22[..., None]
    c11 = ps11 * b1 + ps12 * b2
    c12 = ps11 * b3 + ps12 * b4
    c21 = ps12 * b1 + ps22 * b2
    c22 = ps12 * b3 + ps22 * b4

    # -- sums for the M-step ----------------------------------------------------------
    kk = np.arange(T)[:, None]
    n_s = lay.lengths[None, :]
    w0 = ((kk <= n_s - 2) & (kk >= 0)).astype(float)  # "from" states
    w1 = ((kk >= 1) & (kk <= n_s - 1)).astype(float)  # "to" states
    wa = maskf
    nu = lay.ulen[None, :]
    cnt = lay.count[None, :].astype(float)
    v0 = (kk <= nu - 2) * cnt  # (T, U)
    v1 = ((kk >= 1) & (kk <= nu - 1)) * cnt
    va = (kk <= nu - 1) * cnt

    def msum(w, x):  # masked sum over time and segments of (T, B, S)
        return np.einsum("ts,tbs->b", w, x)

    def csum(v, x):  # weighted sum over time and lengths of (T, B, U)
        return np.einsum("tu,tbu->b", v, x)

    stats = {
        "s0": (msum(w0, xs1), msum(w0, xs2)),
        "s1": (msum(w1, xs1), msum(w1, xs2)),
        "S00": (
            msum(w0, xs1 * xs1) + csum(v0, Ps[0]),
            msum(w0, xs1 * xs2) + csum(v0, Ps[1]),
            msum(w0, xs2 * xs2) + csum(v0, Ps[2]),
        ),
        "S11": (
            msum(w1, xs1 * xs1) + csum(v1, Ps[0]),
            msum(w1, xs1 * xs2) + csum(v1, Ps[1]),
            msum(w1, xs2 * xs2) + csum(v1, Ps[2]),
        ),
        "S10": (
            msum(w1[1:], xs1[1:] * xs1[:-1]) + csum(v1[1:], c11),
            msum(w1[1:], xs1[1:] * xs2[:-1]) + csum(v1[1:], c12),
            msum(w1[1:], xs2[1:] * xs1[:-1]) + csum(v1[1:], c21),
            msum(w1[1:], xs2[1:] * xs2[:-1]) + csum(v1[1:], c22),
        ),
        "Rsum": (
            msum(wa, (y1 - xs1) ** 2) + csum(va, Ps[0]),
            msum(wa, (y2 - xs2) ** 2) + csum(va, Ps[2]),
        ),
    }
    out.update(stats=stats, xs1=xs1, xs2=xs2, Ps=Ps, lag=(c11, c12, c21, c22))
    return out


def _mstep(st: dict[str, Any], lay: _Layout, intercept: bool) -> _Params:
    """Closed-form maximisers of the expected complete-data log-likelihood."""
    N = float(lay.n_trans)
    s01, s02 = st["s0"]
    s11_, s12_ = st["s1"]
    a11, a12, a22 = st["S00"]
    b11, b12, b22 = st["S11"]
    c11, c12, c21, c22 = st["S10"]
    if intercept:  # centre: the intercept is the mean one-step offset
        a11 = a11 - s01 * s01 / N
        a12 = a12 - s01 * s02 / N
        a22 = a22 - s02 * s02 / N
        b11 = b11 - s11_ * s11_ / N
        b12 = b12 - s11_ * s12_ / N
        b22 = b22 - s12_ * s12_ / N
        c11 = c11 - s11_ * s01 / N
        c12 = c12 - s11_ * s02 / N
        c21 = c21 - s12_ * s01 / N
        c22 = c22 - s12_ * s02 / N
    with np.errstate(divide="ignore", invalid="ignore"):
        det = a11 * a22 - a12 * a12
        i11, i12, i22 = a22 / det, -a12 / det, a11 / det
        f11 = c11 * i11 + c12 * i12
        f12 = c11 * i12 + c12 * i22
        f21 = c21 * i11 + c22 * i12
        f22 = c21 * i12 + c22 * i22
    if intercept:
        g1 = (s11_ - f11 * s01 - f12 * s02) / N
        g2 = (s12_ - f21 * s01 - f22 * s02) / N
    else:
        g1 = g2 = np.zeros_like(f11)
    # Qd = (S11 - F S10^T) / N (centred when there is an intercept), symmetrised
    q11 = (b11 - (f11 * c11 + f12 * c12)) / N
    q22 = (b22 - (f21 * c21 + f22 * c22)) / N
    q12 = (b12 - 0.5 * ((f11 * c21 + f12 * c22) + (f21 * c11 + f22 * c12))) / N
    r1, r2 = (v / lay.n_obs for v in st["Rsum"])
    return _Params(f11, f12, f21, f22, g1, g2, q11, q12, q22, r1, r2)


def _em_map(
    th: np.ndarray, y1: np.ndarray, y2: np.ndarray, lay: _Layout, intercept: bool
) -> tuple[np.ndarray, np.ndarray]:
    """One EM step for every replicate: new parameters and the log-likelihood at ``th``."""
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        out = _estep(_from_theta(th, intercept), y1, y2, lay)
        new = _to_theta(_mstep(out["stats"], lay, intercept), intercept)
    return _clip_theta(new, intercept), out["loglik"]


def _loglik(
    th: np.ndarray, y1: np.ndarray, y2: np.ndarray, lay: _Layout, intercept: bool
) -> np.ndarray:
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        return _estep(_from_theta(th, intercept), y1, y2, lay, smooth=False)["loglik"]


def _sym_eig(q11: np.ndarray, q12: np.ndarray, q22: np.ndarray):
    """Eigenvalues (larger, smaller) and the angle of the first eigenvector (closed form)."""
    m = 0.5 * (q11 + q22)
    r = np.hypot(0.5 * (q11 - q22), q12)
    return m + r, m - r, 0.5 * np.arctan2(2.0 * q12, q11 - q22)


def _snap(
    t0: np.ndarray,
    tn: np.ndarray,
    ok: np.ndarray,
    y1: np.ndarray,
    y2: np.ndarray,
    lay: _Layout,
    intercept: bool,
) -> np.ndarray:
    """Move variances that head for zero onto the floor when that raises the likelihood.

    Near a zero variance EM converges sublinearly (the fraction of missing
    information tends to one), so a maximum on the boundary is never reached by EM
    steps alone.  The candidates are each measurement variance and each eigenvalue of
    ``Qd`` that is below :data:`SNAP` (internal units) and fell during the cycle; each
    candidate alone and all of them together are tried, and the best move is kept
    only where it raises the log-likelihood, so the iterations stay monotone.
    """
    p0 = _from_theta(t0, intercept)
    pn = _from_theta(tn, intercept)
    lam1, lam2, phi = _sym_eig(pn.q11, pn.q12, pn.q22)
    o1, o2, _ = _sym_eig(p0.q11, p0.q12, p0.q22)
    vals = np.stack([lam1, lam2, pn.r1, pn.r2], axis=1)
    old = np.stack([o1, o2, p0.r1, p0.r2], axis=1)
    small = (vals < SNAP) & (vals < old) & (vals > FLOOR * (1.0 + 1e-6)) & ok[:, None]
    small[:, 0] &= small[:, 1]  # the larger eigenvalue only with the smaller one
    cand = np.flatnonzero(small.any(axis=1))
    if cand.size == 0:
        return tn
    # proposals: all candidates together, then each alone (masks of shape (P, 4))
    masks = [small[cand]]
    for c in range(4):
        single = np.zeros_like(small[cand])
        single[:, c] = small[cand, c]
        if c == 0:
            single[:, 1] = small[cand, 0]
        masks.append(single)
    n = cand.size
    props = []
    for mk in masks:
        v = np.where(mk, FLOOR, vals[cand])
        cs, sn = np.cos(phi[cand]), np.sin(phi[cand])
        q11 = v[:, 0] * cs * cs + v[:, 1] * sn * sn
        q22 = v[:, 0] * sn * sn + v[:, 1] * cs * cs
        q12 = (v[:, 0] - v[:, 1]) * sn * cs
        q = pn._replace(
            q11=q11, q12=q12, q22=q22, r1=v[:, 2], r2=v[:, 3],
            **{f: getattr(pn, f)[cand] for f in ("f11", "f12", "f21", "f22", "g1", "g2")},
        )  # fmt: skip
        props.append(_clip_theta(_to_theta(q, intercept), intercept))
    allp = np.concatenate([tn[cand], *props])
    rep = np.tile(cand, len(props) + 1)
    ll = _loglik(allp, y1[:, rep], y2[:, rep], lay, intercept).reshape(-1, n)
    ll = np.where(np.isfinite(ll), ll, -np.inf)
    changed = np.array([mk.any(axis=1) for mk in masks])  # (P, n)
    ll[1:] = np.where(changed, ll[1:], -np.inf)
    best = np.argmax(ll, axis=0)
    out = tn.copy()
    up = best > 0
    stack = np.stack(props)  # (P, n, k)
    out[cand[up]] = stack[best[up] - 1, np.flatnonzero(up)]
    return out


class _EMResult(NamedTuple):
    theta: np.ndarray  # (B, k)
    iterations: np.ndarray  # (B,) EM steps
    converged: np.ndarray  # (B,)
    failed: np.ndarray  # (B,)
    newton: np.ndarray | None = None  # (B,) Newton steps


#: EM stops and Newton takes over when a SQUAREM cycle moves the parameters less
_SWITCH = 1e-4
#: at most this many Newton steps
_MAX_NEWTON = 50


def _optimise(
    th0: np.ndarray,
    y1: np.ndarray,
    y2: np.ndarray,
    lay: _Layout,
    intercept: bool,
    settings: dict[str, Any],
    chunk: int,
) -> _EMResult:
    """EM (SQUAREM) steps, then Newton steps to the maximum (batched throughout)."""
    polish = settings["polish"]
    em_tol = max(settings["tol"], _SWITCH) if polish else settings["tol"]
    em = _run_em(th0, y1, y2, lay, intercept, settings["max_iter"], em_tol, settings["accelerate"])
    if not polish:
        return em
    th, nsteps, conv, failed = _newton(
        em.theta, y1, y2, lay, intercept, _MAX_NEWTON, settings["tol"], chunk
    )
    return _EMResult(th, em.iterations, conv, failed | em.failed, nsteps)


def _run_em(
    th0: np.ndarray,
    y1: np.ndarray,
    y2: np.ndarray,
    lay: _Layout,
    intercept: bool,
    max_iter: int,
    tol: float,
    accelerate: bool,
) -> _EMResult:
    """Batched EM (SQUAREM-accelerated) with per-replicate convergence.

    Converged and failed replicates are masked out; the others continue until
    ``max_iter`` EM steps.
    """
    B = th0.shape[0]
    th = _clip_theta(np.asarray(th0, dtype=float), intercept)
    iters = np.zeros(B, dtype=np.int64)
    conv = np.zeros(B, dtype=bool)
    failed = ~np.all(np.isfinite(th), axis=1)
    step_max = np.ones(B)  # adaptive bound on the extrapolation length
    active = np.flatnonzero(~failed)
    while active.size:
        t0 = th[active]
        a1 = y1[:, active]
        a2 = y2[:, active]
        t1, l0 = _em_map(t0, a1, a2, lay, intercept)
        ok = np.isfinite(l0) & np.all(np.isfinite(t1), axis=1)
        if accelerate:
            t2, l1 = _em_map(np.where(ok[:, None], t1, t0), a1, a2, lay, intercept)
            r = t1 - t0
            v = t2 - 2.0 * t1 + t0
            with np.errstate(invalid="ignore", divide="ignore"):
                length = np.sqrt(np.sum(r * r, axis=1) / np.sum(v * v, axis=1))
            cap = step_max[active]
            length = np.where(np.isfinite(length), np.clip(length, 1.0, cap), 1.0)
            alpha = -length
            tp = t0 - 2.0 * alpha[:, None] * r + (alpha * alpha)[:, None] * v
            tp = _clip_theta(np.where(np.isfinite(tp), tp, t2), intercept)
            tn, lp = _em_map(tp, a1, a2, lay, intercept)
            good = np.isfinite(lp) & (lp >= l1) & np.all(np.isfinite(tn), axis=1)
            tn = np.where(good[:, None], tn, t2)
            # the bound grows while extrapolations reach it and shrinks after a failure
            cap = np.where(good & (length >= cap), _STEP_GROWTH * cap, cap)
            step_max[active] = np.where(good, cap, np.maximum(1.0, cap / _STEP_GROWTH))
            ok &= np.isfinite(l1) & np.all(np.isfinite(t2), axis=1)
            steps = 3
        else:
            tn = t1
            steps = 1
        iters[active] += steps
        tn = _snap(t0, tn, ok, a1, a2, lay, intercept)
        step = np.sqrt(np.sum((tn - t0) ** 2, axis=1))
        done = ok & (step < tol)
        th[active] = np.where(ok[:, None], tn, t0)
        conv[active[done]] = True
        failed[active[~ok]] = True
        keep = ok & ~done & (iters[active] < max_iter)
        active = active[keep]
    return _EMResult(th, iters, conv, failed)


def _score(p: _Params, st: dict[str, Any], lay: _Layout, intercept: bool) -> np.ndarray:
    """Gradient (B, k) of the log-likelihood in the internal coordinates.

    By Fisher's identity the score equals the gradient of the expected complete-data
    log-likelihood at the current parameters (Louis, J. R. Stat. Soc. B 44, 1982),
    which is closed form in the E-step sums:
    ``dl/dF = Qd^{-1} (S10 - F S00 - g s0^T)``, ``dl/dg = Qd^{-1} (s1 - F s0 - N g)``,
    ``dl/dQd = Qd^{-1} (W - N Qd) Qd^{-1} / 2`` with ``W`` the expected sum of
    ``w_k w_k^T``, and ``dl/dlog R_j = (E sum (y - x)_j^2 / R_j - M) / 2``.
    """
    N = float(lay.n_trans)
    M = float(lay.n_obs)

    def mat(a, b, c, d):
        return np.stack([np.stack([a, b], -1), np.stack([c, d], -1)], -2)

    F = mat(p.f11, p.f12, p.f21, p.f22)
    g = np.stack([p.g1, p.g2], -1)
    Qd = mat(p.q11, p.q12, p.q12, p.q22)
    S00 = mat(st["S00"][0], st["S00"][1], st["S00"][1], st["S00"][2])
    S11 = mat(st["S11"][0], st["S11"][1], st["S11"][1], st["S11"][2])
    S10 = mat(*st["S10"])
    s0 = np.stack(st["s0"], -1)
    s1 = np.stack(st["s1"], -1)
    Ft = np.swapaxes(F, 1, 2)
    og = np.einsum("bi,bj->bij", g, s0)  # g s0^T
    W = S11 - F @ np.swapaxes(S10, 1, 2) - S10 @ Ft + F @ S00 @ Ft
    gs1 = np.einsum("bi,bj->bij", g, s1)
    W = W - gs1 - np.swapaxes(gs1, 1, 2) + F @ np.swapaxes(og, 1, 2) + og @ Ft
    W = W + N * np.einsum("bi,bj->bij", g, g)
    Qi = linalg2.inv(Qd)
    GF = Qi @ (S10 - F @ S00 - og)
    GQ = 0.5 * Qi @ (W - N * Qd) @ Qi
    GQ = 0.5 * (GQ + np.swapaxes(GQ, 1, 2))
    l11 = np.sqrt(p.q11)
    c = p.q12 / l11
    l22 = np.sqrt(np.maximum(p.q22 - c * c, 0.0))
    L = mat(l11, np.zeros_like(l11), c, l22)
    GL = 2.0 * GQ @ L
    cols = [GF[:, 0, 0], GF[:, 0, 1], GF[:, 1, 0], GF[:, 1, 1]]
    if intercept:
        Gg = np.einsum("bij,bj->bi", Qi, s1 - np.einsum("bij,bj->bi", F, s0) - N * g)
        cols += [Gg[:, 0], Gg[:, 1]]
    cols += [
        GL[:, 0, 0] * l11,
        GL[:, 1, 0],
        GL[:, 1, 1] * l22,
        0.5 * (st["Rsum"][0] / p.r1 - M),
        0.5 * (st["Rsum"][1] / p.r2 - M),
    ]
    return np.stack(cols, axis=1)


def _score_batch(
    th: np.ndarray, y1: np.ndarray, y2: np.ndarray, lay: _Layout, intercept: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Log-likelihood (B,) and score (B, k) at ``th``."""
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        p = _from_theta(th, intercept)
        out = _estep(p, y1, y2, lay)
        return out["loglik"], _score(p, out["stats"], lay, intercept)


#: relative step of the central differences of the score (Hessian)
_HESS_STEP = 1e-5


def _hessian(
    th: np.ndarray, y1: np.ndarray, y2: np.ndarray, lay: _Layout, intercept: bool, chunk: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Log-likelihood (B,), score (B, k) and Hessian (B, k, k) at ``th``.

    The Hessian is the central difference of the exact score; the base point and
    all ``2 k`` perturbations of every replicate are one batch (in chunks of
    ``chunk`` lanes).
    """
    B, k = th.shape
    eps = _HESS_STEP * np.maximum(1.0, np.abs(th))  # (B, k)
    D = np.zeros((2 * k + 1, B, k))
    for i in range(k):
        D[1 + 2 * i, :, i] = eps[:, i]
        D[2 + 2 * i, :, i] = -eps[:, i]
    P = (th[None] + D).reshape(-1, k)  # lane (j, b) -> j * B + b
    rep = np.tile(np.arange(B), 2 * k + 1)
    ll = np.empty(P.shape[0])
    G = np.empty_like(P)
    for a in range(0, P.shape[0], chunk):
        b = min(a + chunk, P.shape[0])
        ll[a:b], G[a:b] = _score_batch(P[a:b], y1[:, rep[a:b]], y2[:, rep[a:b]], lay, intercept)
    G = G.reshape(2 * k + 1, B, k)
    H = (G[1::2] - G[2::2]) / (2.0 * np.swapaxes(eps, 0, 1)[:, :, None])  # (k, B, k)
    H = np.swapaxes(H, 0, 1)
    H = 0.5 * (H + np.swapaxes(H, 1, 2))
    return ll.reshape(2 * k + 1, B)[0], G[0], H


def _at_floor(th: np.ndarray, intercept: bool, factor: float = 1.0 + 1e-9) -> np.ndarray:
    """(B, k) bool: variance coordinates within ``factor`` of their lower bound."""
    j = 6 if intercept else 4
    lf = float(np.log(factor))
    out = np.zeros(th.shape, dtype=bool)
    out[:, j] = th[:, j] <= 0.5 * (_LOG_FLOOR + lf)
    out[:, j + 2] = th[:, j + 2] <= 0.5 * (_LOG_FLOOR + lf)
    out[:, j + 3] = th[:, j + 3] <= _LOG_FLOOR + lf
    out[:, j + 4] = th[:, j + 4] <= _LOG_FLOOR + lf
    return out


#: Newton holds variances within this factor of the floor (their curvature vanishes;
#: boundary moves and EM handle them)
_NEAR = 100.0


def _held(th: np.ndarray, intercept: bool) -> np.ndarray:
    """(B, k) bool: coordinates the Newton steps and the information matrix hold fixed."""
    j = 6 if intercept else 4
    hold = _at_floor(th, intercept, _NEAR)
    hold[:, j + 1] = hold[:, j]  # c = q12 / l11 is not identified with l11 near zero
    return hold


#: a Newton decrement below this fraction of |log-likelihood| where no step length
#: ascends is a stall at the rounding level of the score: converged
_STALL = 1e-8
#: step lengths tried by the Newton line search (one batched pass)
_LINE = np.array([1.0, 0.5, 0.25, 0.1, 0.03, 0.01, 1e-3])


def _newton(
    th0: np.ndarray,
    y1: np.ndarray,
    y2: np.ndarray,
    lay: _Layout,
    intercept: bool,
    max_steps: int,
    tol: float,
    chunk: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Batched Newton ascent with a line search; variances on the floor stay there.

    Variance coordinates near their lower bound (:func:`_held`) are held fixed; on
    the others the Hessian's eigenvalues are replaced by their absolute values
    (modified Newton; Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006,
    sec. 3.4), so every step ascends.  Each step is the longest of :data:`_LINE`
    that satisfies Armijo's condition.

    Returns
    -------
    theta, steps, converged, failed
    """
    B, k = th0.shape
    th = th0.copy()
    steps = np.zeros(B, dtype=np.int64)
    conv = np.zeros(B, dtype=bool)
    failed = ~np.all(np.isfinite(th), axis=1)
    active = np.flatnonzero(~failed)
    L = _LINE.size
    while active.size:
        t = th[active]
        n = active.size
        a1, a2 = y1[:, active], y2[:, active]
        ll, G, H = _hessian(t, a1, a2, lay, intercept, chunk)
        bad = ~(np.isfinite(ll) & np.all(np.isfinite(G), 1) & np.all(np.isfinite(H), (1, 2)))
        G = np.where(bad[:, None], 0.0, G)
        H = np.where(bad[:, None, None], -np.eye(k), H)
        hold = _held(t, intercept)
        Gf = np.where(hold, 0.0, G)
        Hn = -np.where(hold[:, :, None] | hold[:, None, :], 0.0, H)
        Hn[:, np.arange(k), np.arange(k)] += hold  # identity on held coordinates
        # modified Newton: curvatures by their absolute values (every step ascends)
        w, U = np.linalg.eigh(Hn)
        big = np.max(np.abs(w), axis=1, keepdims=True)
        w = np.maximum(np.abs(w), 1e-10 * big)
        d = np.einsum("bij,bj->bi", U, np.einsum("bji,bj->bi", U, Gf) / w)
        d = np.where(hold, 0.0, d)
        slope = np.sum(Gf * d, axis=1)  # the Newton decrement
        cand = _clip_theta((t[None] + _LINE[:, None, None] * d[None]).reshape(-1, k), intercept)
        rep = np.tile(np.arange(n), L)
        lc = np.empty(L * n)
        for a in range(0, L * n, chunk):
            b = min(a + chunk, L * n)
            lc[a:b] = _loglik(cand[a:b], a1[:, rep[a:b]], a2[:, rep[a:b]], lay, intercept)
        lc = lc.reshape(L, n)
        okc = np.isfinite(lc) & (lc >= ll[None] + 1e-4 * _LINE[:, None] * slope[None])
        first = np.argmax(okc, axis=0)
        found = okc[first, np.arange(n)]
        new = cand.reshape(L, n, k)[first, np.arange(n)]
        moved = np.where(found[:, None], new - t, 0.0)
        th[active] = np.where(found[:, None], new, t)
        steps[active] += 1
        size = np.max(np.abs(moved), axis=1)
        # converged: a negligible step, or a decrement at the rounding level of the
        # log-likelihood; a replicate that cannot ascend otherwise stops unconverged
        tiny = slope < _STALL * np.maximum(1.0, np.abs(ll))
        done = ~bad & ((found & (size < tol)) | (~found & tiny))
        conv[active[done]] = True
        failed[active[bad]] = True
        keep = ~bad & ~done & found & (steps[active] < max_steps)
        active = active[keep]
    return th, steps, conv, failed


# ==================================================================================
# start values and units
# ==================================================================================
def _units(values: np.ndarray, eq: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Per-replicate centres and scales (B, 2)."""
    mu = values.mean(axis=1) if eq is None else np.broadcast_to(eq, (values.shape[0], 2))
    sd = values.std(axis=1)
    sd = np.where(sd > 0, sd, np.maximum(np.abs(mu), 1.0))
    return np.array(mu, dtype=float), sd


def _start(
    rec: Recording, z: np.ndarray, intercept: bool, jitter: float
) -> tuple[np.ndarray, np.ndarray]:
    """Starting parameters (B, k) from one-step least squares and residual moments.

    Returns the parameter vectors and a bool (B,) that is False where the
    least-squares fit is singular.
    """
    disc = DiscreteEstimator(jitter_tolerance=jitter)
    d = disc.design(rec, None if intercept else np.zeros(2), z)
    C, c = lstsq(d.Z, d.Y, d.groups)
    F = np.swapaxes(C, 1, 2)  # (B, 2, 2)
    B = F.shape[0]
    g = c[:, 0, :] if intercept else np.zeros((B, 2))
    Z = np.broadcast_to(d.Z, (B, *d.Z.shape[-2:]))
    Y = np.broadcast_to(d.Y, (B, *d.Y.shape[-2:]))
    r = Y - Z @ C - g[:, None, :]
    first = d.info["first"]
    nxt = np.flatnonzero(np.isin(first + 1, first))
    j = np.searchsorted(first, first[nxt] + 1)
    C0 = np.einsum("bki,bkj->bij", r, r) / r.shape[1]
    ok = np.all(np.isfinite(F), axis=(1, 2)) & np.all(np.isfinite(C0), axis=(1, 2))
    F = np.where(ok[:, None, None], F, np.eye(2))
    C0 = np.where(ok[:, None, None], C0, np.eye(2))
    r = np.where(ok[:, None, None], r, 0.0)
    if nxt.size >= 3:
        C1 = np.einsum("bki,bkj->bij", r[:, j], r[:, nxt]) / nxt.size
        with np.errstate(divide="ignore", invalid="ignore"):
            Rm = -(linalg2.inv(F) @ C1)  # -F^{-1} Cov(r_{k+1}, r_k)
        rd = np.where(np.isfinite(Rm), Rm, 0.0)[:, [0, 1], [0, 1]]
    else:
        rd = np.zeros((B, 2))
    c0d = C0[:, [0, 1], [0, 1]]
    # moments can come out negative or tiny: keep each variance in a usable range
    rd = np.clip(rd, 1e-3 * c0d, 0.9 * c0d)
    Rm = rd[:, :, None] * np.eye(2)
    Qm = C0 - Rm - F @ Rm @ np.swapaxes(F, 1, 2)
    qd = np.maximum(Qm[:, [0, 1], [0, 1]], 1e-3 * c0d)
    bound = 0.99 * np.sqrt(qd[:, 0] * qd[:, 1])
    q12 = np.clip(Qm[:, 0, 1], -bound, bound)
    p = _Params(
        F[:, 0, 0], F[:, 0, 1], F[:, 1, 0], F[:, 1, 1], g[:, 0], g[:, 1],
        qd[:, 0], q12, qd[:, 1], rd[:, 0], rd[:, 1],
    )  # fmt: skip
    return _to_theta(p, intercept), ok


def _pairs(rec: Recording, jitter: float) -> tuple[np.ndarray, float]:
    """:func:`one_step_pairs` with this estimator's name in its refusals."""
    try:
        return one_step_pairs(rec, jitter)
    except (SamplingError, TooFewSamplesError) as exc:
        detail = exc.detail.replace("the discrete estimator", "the kalman estimator")
        detail = detail.replace("'integral', 'derivative' or 'trajectory'", "'trajectory'")
        raise type(exc)(detail, source=exc.source, column=exc.column, row=exc.row) from None


# ==================================================================================
# public helpers
# ==================================================================================
def _params_internal(
    F: np.ndarray, g: np.ndarray, Qd: np.ndarray, R: np.ndarray, mu: np.ndarray, sd: np.ndarray
) -> _Params:
    """Original-unit one-step parameters (B, ...) -> internal units (B,) each."""
    Fi = F * sd[:, None, :] / sd[:, :, None]
    gi = (g + np.einsum("bij,bj->bi", F, mu) - mu) / sd
    Qi = Qd / (sd[:, :, None] * sd[:, None, :])
    Ri = R / (sd[:, :, None] * sd[:, None, :])
    return _Params(
        Fi[:, 0, 0], Fi[:, 0, 1], Fi[:, 1, 0], Fi[:, 1, 1], gi[:, 0], gi[:, 1],
        Qi[:, 0, 0], Qi[:, 0, 1], Qi[:, 1, 1], Ri[:, 0, 0], Ri[:, 1, 1],
    )  # fmt: skip


def _params_original(p: _Params, mu: np.ndarray, sd: np.ndarray) -> dict[str, np.ndarray]:
    """Internal parameters -> original-unit F, g, Qd, R (B, ...)."""
    Fi = np.stack([np.stack([p.f11, p.f12], -1), np.stack([p.f21, p.f22], -1)], -2)
    F = Fi * sd[:, :, None] / sd[:, None, :]
    g = sd * np.stack([p.g1, p.g2], -1) + mu - np.einsum("bij,bj->bi", F, mu)
    D = sd[:, :, None] * sd[:, None, :]
    Qd = np.stack([np.stack([p.q11, p.q12], -1), np.stack([p.q12, p.q22], -1)], -2) * D
    z = np.zeros_like(p.r1)
    R = np.stack([np.stack([p.r1, z], -1), np.stack([z, p.r2], -1)], -2) * D
    return {"F": F, "g": g, "Qd": Qd, "R": R}


def _as_batch(x: Any, shape: tuple[int, ...]) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    if a.shape == shape:
        a = a[None]
    if a.shape[1:] != shape:
        raise EstimationError(f"expected an array of shape {shape} or (B, {shape}), got {a.shape}")
    return a


def log_likelihood(
    rec: Recording,
    F: Any,
    g: Any,
    Qd: Any,
    R: Any,
    values: np.ndarray | None = None,
    init: tuple[Any, Any] | None = None,
) -> np.ndarray:
    """Gaussian log-likelihood of the one-step state-space model (batched).

    The model is ``x_{k+1} = F x_k + g + w_k``, ``w ~ N(0, Qd)``, ``y_k = x_k + v_k``,
    ``v ~ N(0, R)``, applied to each gap-free segment of ``rec`` independently (the
    steps are taken as they come; the model is per step).  Only the diagonal of ``R``
    is used (independent sensor noise).

    Parameters
    ----------
    rec : Recording
    F : array_like, shape (2, 2) or (B, 2, 2)
    g : array_like, shape (2,) or (B, 2)
    Qd, R : array_like, shape (2, 2) or (B, 2, 2)
    values : ndarray, shape (B, n, 2), optional
        Replicate values on ``rec``'s sampling (default: the recording's values).
    init : (mean (2,), covariance (2, 2)), optional
        Known distribution of every segment's first state; ``None`` (default) is the
        exact diffuse start (flat prior), the convention of statsmodels'
        ``initialize_diffuse``.

    Returns
    -------
    ndarray, shape (B,)
    """
    V = np.asarray(rec.values if values is None else values, dtype=float)
    V = V[None] if V.ndim == 2 else V
    F, g, Qd, R = (
        _as_batch(F, (2, 2)), _as_batch(g, (2,)), _as_batch(Qd, (2, 2)), _as_batch(R, (2, 2))
    )  # fmt: skip
    B = max(V.shape[0], F.shape[0], g.shape[0], Qd.shape[0], R.shape[0])
    V = np.broadcast_to(V, (B, *V.shape[1:]))
    F = np.broadcast_to(F, (B, 2, 2))
    g = np.broadcast_to(g, (B, 2))
    Qd = np.broadcast_to(Qd, (B, 2, 2))
    R = np.broadcast_to(R, (B, 2, 2))
    R = R * np.eye(2)
    lay = _layout(rec)
    mu, sd = _units(V, None)
    p = _params_internal(F, g, Qd, R, mu, sd)
    y1, y2 = _lanes(lay, (V - mu[:, None, :]) / sd[:, None, :])
    ini = None
    if init is not None:
        m0 = (np.asarray(init[0], dtype=float) - mu) / sd  # (B, 2)
        P0 = np.asarray(init[1], dtype=float) / (sd[:, :, None] * sd[:, None, :])
        ini = (m0[:, 0, None], m0[:, 1, None], P0[:, 0, 0], P0[:, 0, 1], P0[:, 1, 1])
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        ll = _estep(p, y1, y2, lay, smooth=False, init=ini)["loglik"]
    # Jacobian of the change of units; a diffuse first sample has no density
    n_dens = lay.n_obs - (lay.S if init is None else 0)
    return ll - n_dens * np.sum(np.log(sd), axis=1)


def smooth(
    rec: Recording,
    F: Any,
    g: Any,
    Qd: Any,
    R: Any,
    init: tuple[Any, Any] | None = None,
) -> dict[str, np.ndarray]:
    """Smoothed states of one recording under given one-step parameters.

    Parameters are those of :func:`log_likelihood` (one replicate).

    Returns
    -------
    dict
        ``mean`` (n, 2) and ``cov`` (n, 2, 2): ``E[x_k | all data]`` and its
        covariance; ``lag_one`` (n, 2, 2): ``Cov(x_k, x_{k-1} | all data)`` (NaN at
        each segment's first sample); ``filtered`` (n, 2): ``E[x_k | y_0..y_k]``.
        Samples of single-sample segments are NaN.
    """
    V = np.asarray(rec.values, dtype=float)[None]
    lay = _layout(rec)
    mu, sd = _units(V, None)
    p = _params_internal(
        _as_batch(F, (2, 2)), _as_batch(g, (2,)), _as_batch(Qd, (2, 2)),
        _as_batch(R, (2, 2)) * np.eye(2), mu, sd,
    )  # fmt: skip
    y1, y2 = _lanes(lay, (V - mu[:, None, :]) / sd[:, None, :])
    ini = None
    if init is not None:
        m0 = (np.asarray(init[0], dtype=float) - mu) / sd
        P0 = np.asarray(init[1], dtype=float) / (sd[:, :, None] * sd[:, None, :])
        ini = (m0[:, 0, None], m0[:, 1, None], P0[:, 0, 0], P0[:, 0, 1], P0[:, 1, 1])
    out = _estep(p, y1, y2, lay, smooth=True, init=ini)
    n = rec.n_samples
    mean = np.full((n, 2), np.nan)
    filt = np.full((n, 2), np.nan)
    cov = np.full((n, 2, 2), np.nan)
    lag = np.full((n, 2, 2), np.nan)
    s0 = sd[0]
    Ps = out["Ps"]
    lag_c = out["lag"]
    for s, (a, m) in enumerate(zip(lay.starts.tolist(), lay.lengths.tolist(), strict=True)):
        u = int(lay.u_of[s])
        idx = np.arange(a, a + m)
        mean[idx, 0] = mu[0, 0] + s0[0] * out["xs1"][:m, 0, s]
        mean[idx, 1] = mu[0, 1] + s0[1] * out["xs2"][:m, 0, s]
        filt[idx, 0] = mu[0, 0] + s0[0] * out["xf1"][:m, 0, s]
        filt[idx, 1] = mu[0, 1] + s0[1] * out["xf2"][:m, 0, s]
        P = np.stack(
            [np.stack([Ps[0, :m, 0, u], Ps[1, :m, 0, u]], -1),
             np.stack([Ps[1, :m, 0, u], Ps[2, :m, 0, u]], -1)], -2
        )  # fmt: skip
        cov[idx] = P * np.outer(s0, s0)
        L = np.stack(
            [np.stack([lag_c[0][: m - 1, 0, u], lag_c[1][: m - 1, 0, u]], -1),
             np.stack([lag_c[2][: m - 1, 0, u], lag_c[3][: m - 1, 0, u]], -1)], -2
        )  # fmt: skip
        lag[idx[1:]] = L * np.outer(s0, s0)
    return {"mean": mean, "cov": cov, "lag_one": lag, "filtered": filt}


# ==================================================================================
# continuous-time noise and the observed information
# ==================================================================================
def diffusion_from_step(A: np.ndarray, Qd: np.ndarray, h: float) -> np.ndarray:
    """The diffusion ``Q`` whose one-step covariance over ``h`` is ``Qd``.

    Inverts the linear Van Loan map ``Q -> int_0^h expm(A s) Q expm(A s)^T ds``
    (:func:`fitdyn.bootstrap._step_covariance`, Van Loan, IEEE TAC 1978) on the
    three free entries of a symmetric ``Q``.  The result may fail to be positive
    semi-definite when ``Qd`` is not the covariance of any diffusion over ``h``.

    Parameters
    ----------
    A : ndarray, shape (2, 2)
    Qd : ndarray, shape (2, 2)
    h : float

    Returns
    -------
    ndarray, shape (2, 2)
    """
    from fitdyn.bootstrap import _step_covariance

    basis = (np.diag([1.0, 0.0]), np.diag([0.0, 1.0]), np.array([[0.0, 1.0], [1.0, 0.0]]))
    K = np.empty((3, 3))
    for col, E in enumerate(basis):
        C = _step_covariance(A, E, h)
        K[:, col] = [C[0, 0], C[1, 1], C[0, 1]]
    q = np.linalg.solve(K, [Qd[0, 0], Qd[1, 1], Qd[0, 1]])
    return np.array([[q[0], q[2]], [q[2], q[1]]])


def _chunk(lay: _Layout, B: int) -> int:
    per = 8 * lay.T * (40 + 24 * lay.S + 12 * lay.ulen.size)
    return int(max(1, min(B, CHUNK_BYTES // per)))


# ==================================================================================
# the estimator
# ==================================================================================
class KalmanEstimator(NonlinearEstimator):
    """Maximum likelihood of the linear Gaussian state-space model by EM.

    Parameters
    ----------
    max_iter : int, default 500
        Largest number of EM steps per fit (each SQUAREM cycle takes three).
    tol : float, default 1e-9
        Convergence threshold on the change of the internal parameter vector
        ``(F, g, log-Cholesky factor of Qd, log R)``: the largest component of the
        last Newton step (or, with ``polish=False``, the Euclidean change over the
        last EM cycle).
    accelerate : bool, default True
        SQUAREM acceleration (Varadhan & Roland 2008); plain EM when False.
    polish : bool, default True
        After the EM phase (which stops once a cycle moves the parameters less than
        ``1e-4``), Newton steps to the maximum (at most 50).  EM alone stalls where a
        variance tends to zero: with ``Qd`` near zero the smoothed states follow the
        current dynamics and the M-step hardly moves ``F``.
    covariance : bool, default True
        Compute ``param_cov`` from a numerical Hessian of the log-likelihood.
    jitter_tolerance : float, default 0.01
        Largest relative deviation of a step from the median step (as in the
        discrete estimator).

    Notes
    -----
    See the module notes for the model, the diffuse start and the algorithm.
    ``extra`` holds ``process_noise`` (the diffusion ``Q``, 2x2), ``measurement_cov``
    (``R``, diagonal), ``log_likelihood``, ``one_step_matrix`` (``F``),
    ``one_step_constant`` (``g``), ``one_step_noise_cov`` (``Qd``), ``step`` (``h``),
    ``smoothed_states`` (n, 2), ``initial_states`` (smoothed state at the first
    sample of each trajectory), ``iterations`` and ``converged``.  The residuals are
    the one-step innovations ``y_k - E[x_k | y_0..y_{k-1}]``.

    ``param_cov`` is the inverse of the observed information (the negative
    Hessian of the log-likelihood, central differences in the internal parameters,
    all perturbations in one batch) mapped to ``(a11, a12, a21, a22, b1, b2)`` by the
    delta method; variances at the zero boundary are held fixed there.  It is
    ``None`` when the information matrix is not positive definite.
    """

    name: ClassVar[str] = "kalman"
    needs_uniform_steps: ClassVar[bool] = True

    def __init__(
        self,
        max_iter: int = 500,
        tol: float = 1e-9,
        accelerate: bool = True,
        polish: bool = True,
        covariance: bool = True,
        jitter_tolerance: float = 0.01,
        **unknown: Any,
    ) -> None:
        from fitdyn.estimators.derivative import reject_unknown

        reject_unknown(
            self.name,
            unknown,
            ("max_iter", "tol", "accelerate", "polish", "covariance", "jitter_tolerance"),
        )
        if int(max_iter) != max_iter or max_iter < 1:
            raise EstimationError(f"max_iter must be a positive integer, got {max_iter!r}")
        tol = float(tol)
        if not (np.isfinite(tol) and tol > 0):
            raise EstimationError(f"tol must be a positive number, got {tol!r}")
        jit = float(jitter_tolerance)
        if not (np.isfinite(jit) and jit >= 0):
            raise EstimationError(
                f"jitter_tolerance must be a number >= 0, got {jitter_tolerance!r}"
            )
        super().__init__(
            max_iter=int(max_iter),
            tol=tol,
            accelerate=bool(accelerate),
            polish=bool(polish),
            covariance=bool(covariance),
            jitter_tolerance=jit,
        )
        self._reference: dict[str, Any] | None = None

    # -- shared preparation ----------------------------------------------------------------
    def _prepare(self, rec: Recording, eq: np.ndarray | None) -> tuple[float, _Layout]:
        _, h = _pairs(rec, self.settings["jitter_tolerance"])
        lay = _layout(rec)
        k = _n_theta(eq is None)
        if lay.n_trans < 2 * k:
            raise TooFewSamplesError(
                f"the kalman estimator fits {k} parameters and needs at least {2 * k} pairs "
                f"of consecutive samples within gap-free segments, found {lay.n_trans}; "
                "record more samples or use the 'discrete' estimator",
                source=rec.source,
            )
        return h, lay

    def _em(
        self, th0: np.ndarray, y1: np.ndarray, y2: np.ndarray, lay: _Layout, intercept: bool
    ) -> _EMResult:
        k = th0.shape[1]
        chunk = _chunk(lay, (2 * k + 1) * th0.shape[0])
        return _optimise(th0, y1, y2, lay, intercept, self.settings, chunk)

    # -- the point estimate ----------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Maximum-likelihood point estimate (the one-replicate case of the batched EM).

        Raises
        ------
        SamplingError
            When the steps are not uniform.
        TooFewSamplesError
            When there are too few pairs or the samples do not vary in two directions.
        NoRealLogarithmError
            When the fitted one-step matrix has no real logarithm.
        """
        from fitdyn.estimators.derivative import check_equilibrium

        eq = check_equilibrium(equilibrium)
        intercept = eq is None
        h, lay = self._prepare(rec, eq)
        V = np.asarray(rec.values, dtype=float)[None]
        mu, sd = _units(V, eq)
        z = (V - mu[:, None, :]) / sd[:, None, :]
        th0, ok = _start(rec, z, intercept, self.settings["jitter_tolerance"])
        if not ok[0]:
            raise TooFewSamplesError(
                "the one-step regression that starts the kalman fit is singular (the "
                "samples do not vary in two independent directions); record more varied data",
                source=rec.source,
            )
        y1, y2 = _lanes(lay, z)
        res = self._em(th0, y1, y2, lay, intercept)
        if res.failed[0]:
            raise EstimationError(
                "the EM iterations of the kalman fit broke down (non-finite likelihood); "
                "the data may not follow a linear model; use the 'discrete' or "
                "'trajectory' estimator",
                source=rec.source,
            )
        th = res.theta
        p = _from_theta(th, intercept)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
            out = _estep(p, y1, y2, lay)
        orig = _params_original(p, mu, sd)
        F, g, Qd, R = orig["F"][0], orig["g"][0], orig["Qd"][0], orig["R"][0]
        sysb = system_from_one_step(F[None], None if eq is not None else g[None], h, eq)
        if not sysb.valid[0]:
            mu_F = np.linalg.eigvals(F)
            txt = ", ".join(
                f"{v.real:.4g}" if v.imag == 0 else f"{v.real:.4g}{v.imag:+.4g}i" for v in mu_F
            )
            raise NoRealLogarithmError(
                f"the fitted one-step matrix F has eigenvalues {txt}, one of them real and "
                "not positive, so it has no real logarithm and no matrix A of "
                f"dx/dt = A (x - x*) gives these steps (h = {h:.6g}): the sampling is too "
                "coarse, the data too noisy, or the system not of this form; sample with a "
                "finer step or use the 'trajectory' estimator",
                source=rec.source,
            )
        A = sysb.matrix[0]
        b = sysb.offset[0]
        ll_int = float(out["loglik"][0])
        loglik = ll_int - (lay.n_obs - lay.S) * float(np.sum(np.log(sd[0])))

        # innovations (original units), in sample order
        ks, ss_ = lay.innovation_rows()
        resid = np.stack([out["e1"][ks, 0, ss_], out["e2"][ks, 0, ss_]], axis=1) * sd[0]
        m = resid.shape[0]
        dof = max(m - (3 if intercept else 2), 1)
        rcov = resid.T @ resid / dof

        Q_raw = diffusion_from_step(A, Qd, h)
        w, Vq = np.linalg.eigh(Q_raw)
        Q = (Vq * np.clip(w, 0.0, None)) @ Vq.T

        if eq is not None:
            eq_out: np.ndarray | None = eq
        else:
            from fitdyn.estimators.base import equilibrium_from

            xs = equilibrium_from(A[None], b[None])[0]
            eq_out = None if np.any(np.isnan(xs)) else xs

        # smoothed states in sample order
        smoothed = np.array(V[0], dtype=float)
        for s, (a, n_s) in enumerate(zip(lay.starts.tolist(), lay.lengths.tolist(), strict=True)):
            smoothed[a : a + n_s, 0] = mu[0, 0] + sd[0, 0] * out["xs1"][:n_s, 0, s]
            smoothed[a : a + n_s, 1] = mu[0, 1] + sd[0, 1] * out["xs2"][:n_s, 0, s]
        traj = np.asarray(rec.trajectory)
        x0 = np.array(
            [smoothed[int(np.flatnonzero(traj == r)[0])] for r in range(rec.n_trajectories)]
        )

        hold, flags = self._boundary(th, intercept)
        cov6 = None
        cov_note = None
        if self.settings["covariance"]:
            cov6, cov_note = self._param_cov(th, hold, y1, y2, lay, intercept, mu, sd, h, eq)

        names = rec.channels
        warns: list[str] = []
        if not res.converged[0]:
            warns.append(
                f"the kalman fit did not converge (tol {self.settings['tol']:g}, at most "
                f"{self.settings['max_iter']} EM steps"
                + (f" and {_MAX_NEWTON} Newton steps" if self.settings["polish"] else "")
                + "); the estimate may be imprecise: raise max_iter or check the model"
            )
        for j in range(2):
            if flags[f"r{j + 1}"]:
                warns.append(
                    f"measurement noise of channel '{names[j]}' estimated at zero (the lower "
                    "bound): the data show no sensor noise there beyond what the process "
                    "noise explains"
                )
        if flags["q_zero"]:
            warns.append(
                "process noise estimated at zero (the lower bound): the data look like a "
                "deterministic trajectory plus sensor noise, for which the 'trajectory' "
                "estimator is the simpler model"
            )
        elif flags["q_singular"]:
            warns.append(
                "the one-step process noise is estimated at the lower bound in one direction "
                "(a singular noise covariance)"
            )
        if np.min(w) < -1e-9 * max(float(np.max(np.abs(w))), 1e-300):
            warns.append(
                "the fitted one-step noise covariance is not that of any diffusion over "
                f"one step (the exact inverse has eigenvalue {float(np.min(w)):.3g}); the "
                "reported process noise Q is its positive semi-definite part"
            )
        lam = linalg2.eigvals(A)
        wh = float(np.max(np.abs(lam.imag))) * h
        if wh > ALIASING_LIMIT:
            warns.append(
                f"aliasing risk: |Im lambda| * h = {wh:.3g} exceeds pi/2 (the principal "
                f"logarithm assumes it is below pi); the oscillation is sampled fewer than "
                f"{2 * np.pi / wh:.3g} times per period; sample with a finer step"
            )
        if self.settings["covariance"] and cov6 is None:
            warns.append(
                "the observed information matrix of the kalman fit is not positive definite "
                f"({cov_note}); no asymptotic covariance is reported, use a bootstrap"
            )

        notes = [
            "state-space maximum likelihood (Kalman filter) by EM with "
            + ("SQUAREM acceleration" if self.settings["accelerate"] else "plain EM steps")
            + f": {int(res.iterations[0])} EM steps, "
            + (f"{int(res.newton[0])} Newton steps, " if res.newton is not None else "")
            + ("converged" if res.converged[0] else "not converged")
            + f", log-likelihood {loglik:.8g}",
            f"{lay.S} gap-free segment(s), each started from a flat prior on its first "
            f"state (exact diffuse start); {m} one-step innovations, step h = {h:.6g}",
            "measurement noise R diagonal (independent sensors): "
            f"{np.round(np.diag(R), 8).tolist()}; process noise Q (diffusion rate): "
            f"{np.round(Q, 8).tolist()}",
        ]
        if eq is not None:
            notes.append("equilibrium given: no intercept fitted")
        if lay.dropped:
            notes.append(
                f"{lay.dropped} segment(s) of a single sample carry no information on the "
                "dynamics and were left out"
            )
        if cov6 is not None and cov_note:
            notes.append(cov_note)

        self._reference = {
            "times": np.asarray(rec.times, dtype=float).copy(),
            "segment": np.asarray(rec.segment).copy(),
            "eq": None if eq is None else eq.copy(),
            "theta": th[0].copy(),
            "mu": mu[0].copy(),
            "sd": sd[0].copy(),
        }
        extra = {
            "process_noise": Q,
            "measurement_cov": R,
            "log_likelihood": loglik,
            "one_step_matrix": F,
            "one_step_constant": g if eq is None else np.zeros(2),
            "one_step_noise_cov": Qd,
            "step": h,
            "smoothed_states": smoothed,
            "initial_states": x0,
            "iterations": int(res.iterations[0]),
            "newton_steps": 0 if res.newton is None else int(res.newton[0]),
            "converged": bool(res.converged[0]),
        }
        settings = dict(self.settings)
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

    @staticmethod
    def _boundary(th: np.ndarray, intercept: bool) -> tuple[np.ndarray, dict[str, bool]]:
        """Coordinates to hold in the information matrix, and which noise is zero.

        The bounds are on the Cholesky factor of ``Qd`` and on ``R``; a variance or an
        eigenvalue of ``Qd`` within a factor :data:`_NEAR` of the floor counts as zero.
        """
        j = 6 if intercept else 4
        at = _at_floor(th, intercept, _NEAR)[0]
        p = _from_theta(th, intercept)
        lam1, lam2, _ = _sym_eig(p.q11, p.q12, p.q22)
        q_zero = bool(lam1[0] <= _NEAR * FLOOR)
        q_sing = bool(lam2[0] <= _NEAR * FLOOR)
        hold = _held(th, intercept)[0]
        if q_sing and not (at[j] or at[j + 2]):
            hold[j + 2] = True
        if q_zero:
            hold[j : j + 3] = True
        flags = {
            "q_zero": q_zero,
            "q_singular": q_sing,
            "r1": bool(at[j + 3]),
            "r2": bool(at[j + 4]),
        }
        return hold, flags

    def _param_cov(
        self,
        th: np.ndarray,
        hold: np.ndarray,
        y1: np.ndarray,
        y2: np.ndarray,
        lay: _Layout,
        intercept: bool,
        mu: np.ndarray,
        sd: np.ndarray,
        h: float,
        eq: np.ndarray | None,
    ) -> tuple[np.ndarray | None, str]:
        """Delta-method covariance of (a11, a12, a21, a22, b1, b2), or None and why."""
        k = th.shape[1]
        free = np.flatnonzero(~hold)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
            _, _, H = _hessian(th, y1, y2, lay, intercept, _chunk(lay, 2 * k + 1))
        Hf = H[0][np.ix_(free, free)]
        if not np.all(np.isfinite(Hf)):
            return None, "non-finite Hessian"
        info = -Hf
        wv = np.linalg.eigvalsh(info)
        if not wv[0] > 1e-10 * wv[-1]:
            return None, f"smallest eigenvalue {wv[0]:.3g} of {wv[-1]:.3g}"
        cov_free = np.linalg.inv(info)
        # Jacobian of (A, b) with respect to the (F, g) coordinates (internal units)
        n_fg = 6 if intercept else 4
        base = th[0]
        eps = 1e-6 * np.maximum(np.abs(base[:n_fg]), 1e-3)
        pert = np.repeat(base[None], 2 * n_fg, axis=0)
        pert[np.arange(n_fg), np.arange(n_fg)] += eps
        pert[n_fg + np.arange(n_fg), np.arange(n_fg)] -= eps
        p = _from_theta(pert, intercept)
        o = _params_original(
            p, np.broadcast_to(mu, (2 * n_fg, 2)), np.broadcast_to(sd, (2 * n_fg, 2))
        )
        sysb = system_from_one_step(o["F"], None if eq is not None else o["g"], h, eq)
        six = np.concatenate([sysb.matrix.reshape(-1, 4), sysb.offset], axis=1)
        if not np.all(np.isfinite(six)):
            return None, "the log map is not differentiable here"
        Jfg = (six[:n_fg] - six[n_fg:]).T / (2.0 * eps)  # (6, n_fg)
        J = np.zeros((6, free.size))
        for col, i in enumerate(free.tolist()):
            if i < n_fg:
                J[:, col] = Jfg[:, i]
        cov = J @ cov_free @ J.T
        note = "param_cov: inverse observed information (score differences), delta method"
        if hold.any():
            note += f"; {int(hold.sum())} noise coordinate(s) held at the zero boundary"
        return 0.5 * (cov + cov.T), note

    # -- replicates -----------------------------------------------------------------------
    def fit_values(
        self, rec: Recording, values: np.ndarray, equilibrium: np.ndarray | None = None
    ) -> SystemBatch:
        """Refit replicate values (B, n, 2) in one batched EM (chunked).

        When :meth:`fit` ran on a recording with the same sampling and equilibrium
        setting, every replicate starts from that point estimate (in its internal
        units); otherwise each replicate starts from its own one-step least-squares
        fit and residual moments.  Replicates that do not converge within
        ``max_iter`` EM steps, whose iterations break down, or whose one-step matrix
        has no real logarithm are returned with ``valid = False`` (never redrawn).
        """
        from fitdyn.estimators.derivative import check_equilibrium, replicate_values

        eq = check_equilibrium(equilibrium)
        intercept = eq is None
        V, _ = replicate_values(rec, values)
        B = V.shape[0]
        h, lay = self._prepare(rec, eq)
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
        size = _chunk(lay, B)
        for a in range(0, B, size):
            sl = slice(a, min(a + size, B))
            Vc = V[sl]
            n = Vc.shape[0]
            if use_ref:
                assert ref is not None
                mu = np.broadcast_to(ref["mu"], (n, 2))
                sd = np.broadcast_to(ref["sd"], (n, 2))
                z = (Vc - mu[:, None, :]) / sd[:, None, :]
                th0 = np.repeat(ref["theta"][None], n, axis=0)
                ok = np.ones(n, dtype=bool)
            else:
                mu, sd = _units(Vc, eq)
                z = (Vc - mu[:, None, :]) / sd[:, None, :]
                th0, ok = _start(rec, z, intercept, self.settings["jitter_tolerance"])
                th0 = np.where(ok[:, None], th0, np.nan)
            y1, y2 = _lanes(lay, z)
            res = self._em(th0, y1, y2, lay, intercept)
            p = _from_theta(res.theta, intercept)
            o = _params_original(p, mu, sd)
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                sysb = system_from_one_step(o["F"], None if eq is not None else o["g"], h, eq)
            good = sysb.valid & res.converged & ~res.failed & ok
            mats[sl] = np.where(good[:, None, None], sysb.matrix, np.nan)
            offs[sl] = np.where(good[:, None], sysb.offset, np.nan)
            valid[sl] = good
        return SystemBatch(matrix=mats, offset=offs, valid=valid)
