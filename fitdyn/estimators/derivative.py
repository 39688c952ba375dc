"""Derivative regression: estimate ``dx/dt`` at the samples, regress it on the states.

The regression is ``dx/dt (t_i) = A x_i + b + e_i`` fitted by least squares over
every sample of every gap-free segment (one shared intercept ``b``; with a known
equilibrium ``x*`` the regressors are ``x_i - x*`` and no intercept is fitted).

Derivatives (setting ``derivative``):

``"fd"``
    Second-order three-point finite differences with unequal spacings (the Lagrange
    interpolating parabola through three neighbours), one-sided second-order
    formulas at segment ends.  Vectorised over samples and replicates.  No
    smoothing: with measurement noise and close samples it amplifies the noise
    badly (see the benchmark).
``"savgol"``
    Savitzky-Golay local polynomial fits (Savitzky & Golay, *Anal. Chem.* 36, 1964)
    on uniform segments via :func:`scipy.signal.savgol_filter` with ``deriv=1``
    (``mode="interp"``).  Irregular segments get the same construction on their
    own times (``"local"``); segments shorter than the smallest window get ``"fd"``.
``"local"``
    The Savitzky-Golay construction on any grid: at each sample a least-squares
    polynomial of degree ``polyorder`` through the ``window`` nearest samples of
    its segment (the window slides, and is clipped at segment ends), evaluated and
    differentiated at the sample.  On a uniform grid it equals ``"savgol"``.  The
    operators are sparse matrices built once from the times, so replicates are
    one sparse product.
``"spline"``
    A cubic smoothing spline per segment and channel with the smoothing parameter
    chosen by GCV (:func:`scipy.interpolate.make_smoothing_spline` with
    ``lam=None``); its derivative at the samples.  Segments with fewer than five
    samples fall back to ``"fd"``.  This option loops in Python over replicates,
    segments and channels (GCV is solved for each), so it is the slow one for
    bootstraps.

Default: ``"savgol"`` on uniform segments, ``"local"`` on irregular ones.  The
window of both is chosen from the data by generalized cross-validation of the
smoothing (Craven & Wahba, *Numer. Math.* 31, 1979): one window for both channels,
minimising the sum of the per-channel log GCV scores, so that the choice does not
depend on the channels' units.

Errors in variables: measurement noise in the regressor ``x`` biases ``A`` toward
zero (attenuation) and differencing amplifies noise.  With a smoothing derivative
the smoothed states (the local fit's value, or the spline's) are used as regressors
by default (``smooth_states``), which removes most of the attenuation; see
``benchmarks/accuracy.py`` for the measured effect.  With ``"fd"`` the raw samples
are used.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np

from fitdyn.errors import EstimationError, TooFewSamplesError
from fitdyn.estimators.base import Design, Estimator, SystemBatch
from fitdyn.recording import Recording

__all__ = [
    "DerivativeEstimator",
    "DERIVATIVES",
    "finite_difference",
    "smoothing_window",
    "local_polynomial",
    "regression_covariance",
    "segment_groups",
    "reject_unknown",
]

#: Derivative options.
DERIVATIVES: tuple[str, ...] = ("fd", "savgol", "local", "spline")

#: Smallest segment that gets a derivative (three points for second order).
_MIN_SEGMENT = 3


# ----------------------------------------------------------------------------------
# helpers shared by the regression estimators
# ----------------------------------------------------------------------------------
def segment_groups(rec: Recording) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Segment number 0..S-1 of each sample, in order of appearance, and the bounds.

    Parameters
    ----------
    rec : Recording

    Returns
    -------
    groups : int ndarray, shape (n,)
    bounds : list of (start, stop)
    """
    bounds = rec.segment_bounds()
    groups = np.empty(rec.n_samples, dtype=np.int64)
    for k, (a, b) in enumerate(bounds):
        groups[a:b] = k
    return groups, bounds


def reject_unknown(method: str, unknown: dict[str, Any], allowed: tuple[str, ...]) -> None:
    """Raise a one-line error for settings the estimator does not have."""
    if unknown:
        names = ", ".join(sorted(unknown))
        have = ", ".join(allowed) if allowed else "none"
        raise EstimationError(
            f"method '{method}' has no setting(s) {names}; its settings are: {have}"
        )


def check_equilibrium(equilibrium: np.ndarray | None) -> np.ndarray | None:
    """A known equilibrium as a float array of shape (2,), or None."""
    if equilibrium is None:
        return None
    eq = np.asarray(equilibrium, dtype=float).reshape(-1)
    if eq.shape != (2,) or not np.all(np.isfinite(eq)):
        raise EstimationError(
            f"a known equilibrium must be two finite numbers (one per channel), got {eq.tolist()}"
        )
    return eq


def replicate_values(rec: Recording, values: np.ndarray | None) -> tuple[np.ndarray, bool]:
    """Channel values as (B, n, 2) and whether a batch was given."""
    if values is None:
        return np.asarray(rec.values, dtype=float)[None], False
    V = np.asarray(values, dtype=float)
    if V.ndim == 2:
        V = V[None]
    if V.ndim != 3 or V.shape[1:] != rec.values.shape:
        raise EstimationError(
            f"replicate values must have shape (B, {rec.n_samples}, 2), got {np.shape(values)}"
        )
    return V, True


def regression_covariance(
    Z: np.ndarray, rcov: np.ndarray, equilibrium: np.ndarray | None
) -> np.ndarray | None:
    """OLS covariance of (a11, a12, a21, a22, b1, b2) for a regression ``Y = Z C + E``.

    Parameters
    ----------
    Z : ndarray, shape (m, 3) or (m, 2)
        Regressor columns (x1, x2, b-column) when ``b`` is estimated, (x1, x2) when
        the equilibrium is known; any per-group intercepts already projected out
        (columns centred within groups).
    rcov : ndarray, shape (2, 2)
        Residual covariance of the two equations.
    equilibrium : ndarray (2,) or None
        The known equilibrium (then ``b = -A x*`` and its covariance follows by the
        delta method, which is exact here because ``b`` is linear in ``A``).

    Returns
    -------
    ndarray, shape (6, 6), or None when ``Z'Z`` is singular.

    Notes
    -----
    ``Cov(vec C) = rcov (x) (Z'Z)^{-1}`` with ``vec`` stacking the columns of ``C``
    (one column per equation); ``a_kj = C[j, k]`` and ``b_k = C[2, k]``.  This
    assumes independent rows, which smoothed derivatives and cumulative integrals
    violate; the estimators say so in their notes.
    """
    Z = np.asarray(Z, dtype=float)
    q = Z.shape[1]
    scale = np.sqrt(np.mean(Z * Z, axis=0))
    scale = np.where(scale > 0, scale, 1.0)
    Zs = Z / scale
    G = Zs.T @ Zs
    if not np.all(np.isfinite(G)) or np.linalg.cond(G) > 1e14:
        return None
    Ginv = np.linalg.inv(G) / np.outer(scale, scale)
    cov_vec = np.kron(rcov, Ginv)  # index k * q + j
    n_a = 4
    # J maps vec(C) (2 q entries) to (a11, a12, a21, a22, b1, b2)
    J = np.zeros((6, 2 * q))
    for k in range(2):
        for j in range(2):
            J[2 * k + j, k * q + j] = 1.0
    if equilibrium is None:
        for k in range(2):
            J[n_a + k, k * q + 2] = 1.0
    else:
        for k in range(2):
            for j in range(2):
                J[n_a + k, k * q + j] = -equilibrium[j]
    cov = J @ cov_vec @ J.T
    return 0.5 * (cov + cov.T)


def center_within(Z: np.ndarray, groups: np.ndarray | None) -> np.ndarray:
    """Columns of ``Z`` (m, p) centred within groups (unchanged without groups)."""
    if groups is None:
        return Z
    G = int(groups.max()) + 1
    counts = np.bincount(groups, minlength=G).astype(float)
    sums = np.zeros((G, Z.shape[1]))
    np.add.at(sums, groups, Z)
    return Z - (sums / np.maximum(counts, 1.0)[:, None])[groups]


def is_uniform(t: np.ndarray, tolerance: float) -> bool:
    """Whether the steps of ``t`` deviate from their median by at most ``tolerance``."""
    if t.size < 2:
        return False
    d = np.diff(t)
    med = float(np.median(d))
    return bool(med > 0 and np.max(np.abs(d - med)) <= tolerance * med)


# ----------------------------------------------------------------------------------
# derivative operators
# ----------------------------------------------------------------------------------
def finite_difference(
    times: np.ndarray, bounds: list[tuple[int, int]]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Stencils of the second-order three-point derivative with unequal spacings.

    Parameters
    ----------
    times : ndarray, shape (n,)
    bounds : list of (start, stop)
        Segments to differentiate (each with at least three samples); samples are
        never combined across segments.

    Returns
    -------
    rows : int ndarray, shape (m,)
        Sample index of each derivative.
    idx : int ndarray, shape (m, 3)
        The three samples of each stencil.
    wts : ndarray, shape (m, 3)
        Their weights: ``dx/dt[rows] ~= sum_k wts[:, k] x[idx[:, k]]``.

    Notes
    -----
    With ``h1 = t_i - t_{i-1}`` and ``h2 = t_{i+1} - t_i`` the central weights are
    ``(-h2 / (h1 (h1 + h2)), (h2 - h1) / (h1 h2), h1 / (h2 (h1 + h2)))``; the
    one-sided end formulas differentiate the same parabola at its first or last node.
    """
    t = np.asarray(times, dtype=float)
    rows_l, idx_l = [], []
    for a, b in bounds:
        k = b - a
        if k < _MIN_SEGMENT:
            continue
        i = np.arange(a, b)
        centre = np.clip(i, a + 1, b - 2)  # the middle node of each stencil
        rows_l.append(i)
        idx_l.append(np.stack([centre - 1, centre, centre + 1], axis=1))
    if not rows_l:
        return np.zeros(0, dtype=np.int64), np.zeros((0, 3), dtype=np.int64), np.zeros((0, 3))
    rows = np.concatenate(rows_l)
    idx = np.concatenate(idx_l)
    t0, t1, t2 = t[idx[:, 0]], t[idx[:, 1]], t[idx[:, 2]]
    tx = t[rows]
    # derivative at tx of the parabola through (t0, t1, t2): Lagrange basis slopes
    w0 = ((tx - t1) + (tx - t2)) / ((t0 - t1) * (t0 - t2))
    w1 = ((tx - t0) + (tx - t2)) / ((t1 - t0) * (t1 - t2))
    w2 = ((tx - t0) + (tx - t1)) / ((t2 - t0) * (t2 - t1))
    return rows, idx, np.stack([w0, w1, w2], axis=1)


@lru_cache(maxsize=256)
def _savgol_trace_parts(window: int, polyorder: int) -> tuple[float, float]:
    """Centre weight and summed edge hat values of the Savitzky-Golay smoother."""
    from scipy.signal import savgol_coeffs

    half = window // 2
    c0 = float(savgol_coeffs(window, polyorder, deriv=0, use="conv")[half])
    u = (np.arange(window, dtype=float) - half) / max(half, 1)
    V = np.vander(u, polyorder + 1)
    G = np.linalg.inv(V.T @ V)
    edge = float(np.einsum("ij,jk,ik->", V[:half], G, V[:half]))
    return c0, edge


def _savgol_trace(n: int, window: int, polyorder: int) -> float:
    """Trace of the Savitzky-Golay smoothing operator (``mode='interp'``) on n points.

    Interior rows contribute the centre weight; the ``window // 2`` rows at each end
    are the polynomial fit of the first (last) window evaluated there, whose
    diagonal is the hat matrix ``V (V'V)^{-1} V'`` of that fit.
    """
    c0, edge = _savgol_trace_parts(int(window), int(polyorder))
    return (n - 2 * (window // 2)) * c0 + 2.0 * edge


def min_window(polyorder: int) -> int:
    """Smallest odd window that leaves a degree of freedom for the polynomial fit."""
    w = polyorder + 2
    return w if w % 2 else w + 1


def _window_candidates(longest: int, polyorder: int, cap: int | None) -> np.ndarray:
    lo = min_window(polyorder)
    hi = longest if longest % 2 else longest - 1
    hi = min(hi, max(lo, 2 * (longest // 3) + 1))
    if cap is not None:
        hi = min(hi, cap)
    if hi < lo:
        return np.zeros(0, dtype=np.int64)
    cand = np.unique(np.round(np.geomspace(lo, hi, 40)).astype(np.int64))
    cand = np.unique(np.where(cand % 2 == 0, cand + 1, cand))
    return cand[(cand >= lo) & (cand <= hi)]


#: The window search stops after this many candidates in a row that do not improve
#: on the best GCV score (the grid grows by about 20 % per candidate).
_GCV_PATIENCE = 6

#: Largest window of the ``"local"`` smoother (its operators store window x samples).
LOCAL_WINDOW_CAP = 501


def local_polynomial(times: np.ndarray, window: int, polyorder: int):
    """Sparse smoothing and derivative operators of sliding local polynomial fits.

    Parameters
    ----------
    times : ndarray, shape (k,)
        Increasing times of one segment (``k >= window``).
    window : int
        Samples per local fit.
    polyorder : int
        Degree of the local polynomial (``< window``).

    Returns
    -------
    S, D : scipy.sparse.csr_matrix, shape (k, k)
        ``S @ x`` are the fitted values and ``D @ x`` the fitted slopes at the
        samples.  Sample ``i`` uses samples ``s_i .. s_i + window - 1`` with
        ``s_i = clip(i - window // 2, 0, k - window)``, which on a uniform grid is
        the Savitzky-Golay filter with ``mode="interp"``.
    """
    from scipy.sparse import csr_matrix

    t = np.asarray(times, dtype=float)
    k = t.size
    half = window // 2
    start = np.clip(np.arange(k) - half, 0, k - window)
    idx = start[:, None] + np.arange(window)[None, :]
    W0 = np.empty((k, window))
    W1 = np.empty((k, window))
    chunk = max(1, 2_000_000 // (window * (polyorder + 1)))
    powers = np.arange(polyorder + 1)
    for c0 in range(0, k, chunk):
        sl = slice(c0, min(k, c0 + chunk))
        tw = t[idx[sl]]
        scale = 0.5 * (tw[:, -1] - tw[:, 0])[:, None]
        u = (tw - t[sl][:, None]) / scale
        P = np.linalg.pinv(u[..., None] ** powers)  # (c, p + 1, w)
        W0[sl] = P[:, 0, :]
        W1[sl] = P[:, 1, :] / scale
    rows = np.repeat(np.arange(k), window)
    S = csr_matrix((W0.ravel(), (rows, idx.ravel())), shape=(k, k))
    D = csr_matrix((W1.ravel(), (rows, idx.ravel())), shape=(k, k))
    return S, D


def _apply(op, seg: np.ndarray) -> np.ndarray:
    """A sparse (k, k) operator applied to values (B, k, 2) in one product."""
    B, k, c = seg.shape
    flat = np.moveaxis(seg, 1, 0).reshape(k, B * c)
    return np.moveaxis((op @ flat).reshape(k, B, c), 0, 1)


def smoothing_window(
    values: np.ndarray,
    times: np.ndarray,
    bounds: list[tuple[int, int]],
    kinds: list[str],
    polyorder: int,
) -> tuple[int | None, dict[int, float]]:
    """The local-polynomial window minimising generalized cross-validation.

    Parameters
    ----------
    values : ndarray, shape (n, 2)
    times : ndarray, shape (n,)
    bounds : list of (start, stop)
        The segments to be smoothed.
    kinds : list of {"savgol", "local"}
        The smoother of each segment (Savitzky-Golay filter or the sparse local
        operator; the same fit on uniform grids).
    polyorder : int

    Returns
    -------
    window : int or None
        None when no segment is long enough.
    scores : dict
        The criterion ``sum_j log GCV_j(w)`` of every candidate window.

    Notes
    -----
    ``GCV_j(w) = N RSS_j(w) / (N - tr S_w)^2`` over the pooled segments at least
    ``w`` long, with ``S_w`` the smoothing operator (its exact trace, edges
    included).  Summing the logarithms over channels makes the choice independent
    of channel units.  Candidates are about 40 odd windows in geometric progression
    from the smallest to two thirds of the longest segment; the scan stops after
    six candidates in a row fail to improve on the best.
    """
    from scipy.signal import savgol_filter

    lengths = [b - a for a, b in bounds]
    if not lengths:
        return None, {}
    cap = LOCAL_WINDOW_CAP if "local" in kinds else None
    cand = _window_candidates(max(lengths), polyorder, cap)
    scale = np.mean([np.var(values[a:b], axis=0) for a, b in bounds], axis=0)
    floor = 1e-28 * np.maximum(scale, 1e-300)
    scores: dict[int, float] = {}
    worse = 0
    for w in cand:
        w = int(w)
        if worse >= _GCV_PATIENCE:
            break
        rss = np.zeros(2)
        N = 0
        tr = 0.0
        for (a, b), kd in zip(bounds, kinds, strict=True):
            if b - a < w:
                continue
            seg = values[a:b]
            if kd == "savgol":
                sm = savgol_filter(seg, w, polyorder, deriv=0, axis=0, mode="interp")
                tr += _savgol_trace(b - a, w, polyorder)
            else:
                S, _ = local_polynomial(times[a:b], w, polyorder)
                sm = S @ seg
                tr += float(S.diagonal().sum())
            rss += np.sum((seg - sm) ** 2, axis=0)
            N += b - a
        if N == 0 or N - tr <= 0:
            continue
        gcv = N * np.maximum(rss / N, floor) / (N - tr) ** 2
        score = float(np.sum(np.log(gcv)))
        worse = worse + 1 if scores and score >= min(scores.values()) else 0
        scores[w] = score
    if not scores:
        return None, {}
    best = min(scores, key=lambda k: (scores[k], k))
    return best, scores


# ----------------------------------------------------------------------------------
# the estimator
# ----------------------------------------------------------------------------------
class DerivativeEstimator(Estimator):
    """Least squares of estimated derivatives on the states.

    Parameters
    ----------
    derivative : {"fd", "savgol", "local", "spline"} or None
        How ``dx/dt`` is estimated (see the module notes).  ``None`` (default):
        ``"savgol"`` on uniform segments, ``"local"`` on irregular ones.
    smooth_states : bool or None
        Use the smoothed states as regressors where a smoothing derivative was used
        (``None``, the default: yes unless ``derivative="fd"``).
    window : int or None
        Local polynomial (Savitzky-Golay) window in samples (odd); ``None`` chooses
        it by GCV.  Segments shorter than the window use the longest odd window
        that fits.
    polyorder : int
        Degree of the local polynomials (default 3).

    Notes
    -----
    Segments with fewer than three samples carry no second-order derivative and
    are left out of the regression (counted in the notes); segments shorter than
    the smallest window (``polyorder + 2``, odd) use finite differences.  For
    bootstrap replicates the window chosen on the recording's own values is reused,
    so window-selection variability is not part of the replicates.
    """

    name = "derivative"
    needs_uniform_steps = False
    is_regression = True

    def __init__(
        self,
        derivative: str | None = None,
        smooth_states: bool | None = None,
        window: int | None = None,
        polyorder: int = 3,
        **unknown: Any,
    ) -> None:
        reject_unknown(self.name, unknown, ("derivative", "smooth_states", "window", "polyorder"))
        if derivative is not None and derivative not in DERIVATIVES:
            raise EstimationError(
                f"unknown derivative '{derivative}'; choose one of: {', '.join(DERIVATIVES)}"
            )
        if window is not None:
            if int(window) != window or window < 3 or window % 2 == 0:
                raise EstimationError(f"window must be an odd integer >= 3, got {window!r}")
            if window <= polyorder:
                raise EstimationError(
                    f"window ({window}) must exceed polyorder ({polyorder}); widen the window"
                )
        if int(polyorder) != polyorder or not 1 <= polyorder <= 6:
            raise EstimationError(f"polyorder must be an integer 1..6, got {polyorder!r}")
        super().__init__(
            derivative=derivative,
            smooth_states=smooth_states,
            window=None if window is None else int(window),
            polyorder=int(polyorder),
        )

    # -- derivative per segment ---------------------------------------------------------
    def _plan(self, rec: Recording, bounds: list[tuple[int, int]]) -> dict[str, Any]:
        """Which derivative each segment gets, and the smoothing window of each."""
        requested = self.settings["derivative"]
        p = self.settings["polyorder"]
        tol = rec.jitter_tolerance
        t = np.asarray(rec.times, dtype=float)
        lo = min_window(p)
        kinds: list[str | None] = []
        for a, b in bounds:
            k = b - a
            if k < _MIN_SEGMENT:
                kinds.append(None)
            elif requested == "fd":
                kinds.append("fd")
            elif requested == "spline":
                kinds.append("spline" if k >= 5 else "fd")
            elif k < lo:
                kinds.append("fd")
            elif requested == "local":
                kinds.append("local")
            else:  # savgol, requested or by default
                kinds.append("savgol" if is_uniform(t[a:b], tol) else "local")
        window = self.settings["window"]
        smoothers = [
            (bd, kd) for bd, kd in zip(bounds, kinds, strict=True) if kd in ("savgol", "local")
        ]
        if smoothers and window is None:
            window, _ = smoothing_window(
                np.asarray(rec.values, dtype=float),
                t,
                [bd for bd, _ in smoothers],
                [kd for _, kd in smoothers],
                p,
            )
        windows: list[int | None] = []
        for (a, b), kd in zip(bounds, kinds, strict=True):
            if kd in ("savgol", "local") and window is not None:
                k = b - a
                windows.append(min(int(window), k if k % 2 else k - 1))
            else:
                windows.append(None)
        smooth = self.settings["smooth_states"]
        if smooth is None:
            smooth = requested != "fd"
        return {
            "kinds": kinds,
            "window": window,
            "windows": windows,
            "smooth_states": bool(smooth),
        }

    def _derivatives(
        self, rec: Recording, V: np.ndarray, bounds: list[tuple[int, int]], plan: dict[str, Any]
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rows, derivatives (B, m, 2) and regressor states (B, m, 2)."""
        t = np.asarray(rec.times, dtype=float)
        kinds = plan["kinds"]
        p = self.settings["polyorder"]
        B = V.shape[0]
        D = np.zeros_like(V)
        X = V.copy()
        smooth = plan["smooth_states"]
        fd_bounds = [bd for bd, kd in zip(bounds, kinds, strict=True) if kd == "fd"]
        if fd_bounds:
            rows, idx, wts = finite_difference(t, fd_bounds)
            D[:, rows, :] = np.einsum("mk,bmkj->bmj", wts, V[:, idx, :])
        for (a, b), kd, w in zip(bounds, kinds, plan["windows"], strict=True):
            seg = V[:, a:b, :]
            if kd == "savgol":
                from scipy.signal import savgol_filter

                h = float(np.median(np.diff(t[a:b])))
                D[:, a:b, :] = savgol_filter(seg, w, p, deriv=1, delta=h, axis=1, mode="interp")
                if smooth:
                    X[:, a:b, :] = savgol_filter(seg, w, p, deriv=0, axis=1, mode="interp")
            elif kd == "local":
                S, Dop = local_polynomial(t[a:b], w, p)
                D[:, a:b, :] = _apply(Dop, seg)
                if smooth:
                    X[:, a:b, :] = _apply(S, seg)
            elif kd == "spline":
                from scipy.interpolate import make_smoothing_spline

                ts = t[a:b]
                for r in range(B):
                    for j in range(2):
                        spl = make_smoothing_spline(ts, V[r, a:b, j], lam=None)
                        D[r, a:b, j] = spl(ts, nu=1)
                        if smooth:
                            X[r, a:b, j] = spl(ts)
        used = np.concatenate(
            [np.arange(a, b) for (a, b), kd in zip(bounds, kinds, strict=True) if kd is not None]
            or [np.zeros(0, dtype=np.int64)]
        ).astype(np.int64)
        return used, D[:, used, :], X[:, used, :]

    # -- protocol -----------------------------------------------------------------------
    def design(
        self,
        rec: Recording,
        equilibrium: np.ndarray | None = None,
        values: np.ndarray | None = None,
    ) -> Design:
        """Regression rows ``dx/dt = A x + b`` of a recording (see the class notes)."""
        eq = check_equilibrium(equilibrium)
        V, batched = replicate_values(rec, values)
        groups_all, bounds = segment_groups(rec)
        plan = self._plan(rec, bounds)
        rows, D, X = self._derivatives(rec, V, bounds, plan)
        m = rows.size
        if m < 4 - (eq is not None):
            raise TooFewSamplesError(
                f"the derivative regression has {m} usable rows (segments of at least "
                f"{_MIN_SEGMENT} samples); record more samples or use method 'trajectory'",
                source=rec.source,
            )
        Z = X - eq if eq is not None else X
        counts = {k: sum(kd == k for kd in plan["kinds"]) for k in (*DERIVATIVES, None)}
        info = {
            "equilibrium": eq,
            "kinds": plan["kinds"],
            "counts": counts,
            "window": plan["window"],
            "smooth_states": plan["smooth_states"],
            "skipped_samples": int(rec.n_samples - m),
        }
        return Design(
            Z=Z if batched else Z[0],
            Y=D if batched else D[0],
            groups=None if eq is not None else np.zeros(m, dtype=np.int64),
            row_segment=groups_all[rows],
            row_trajectory=np.asarray(rec.trajectory)[rows],
            row_index=rows,
            info=info,
        )

    def to_system(self, C: np.ndarray, c: np.ndarray, design: Design) -> SystemBatch:
        """``A = C^T``; ``b`` is the intercept, or ``-A x*`` for a known equilibrium."""
        A = np.swapaxes(C[:, :2, :], -1, -2)
        eq = design.info["equilibrium"]
        b = -A @ eq if eq is not None else c[:, 0, :]
        valid = np.all(np.isfinite(A), axis=(-2, -1)) & np.all(np.isfinite(b), axis=-1)
        return SystemBatch(matrix=A, offset=b, valid=valid)

    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None):
        """Point estimate; the settings in the result are the resolved ones."""
        from dataclasses import replace

        est = super().fit(rec, equilibrium)
        return replace(est, settings=self._resolved(est.extra))

    def _resolved(self, extra: dict[str, Any]) -> dict[str, Any]:
        s = dict(self.settings)
        counts = extra["segments_by_derivative"]
        used = [k for k in DERIVATIVES if counts.get(k)]
        s["derivative"] = used[0] if len(used) == 1 else "+".join(used)
        s["window"] = extra["window"]
        s["smooth_states"] = extra["smooth_states"]
        return s

    # -- hooks --------------------------------------------------------------------------
    def parameter_covariance(
        self, d: Design, C: np.ndarray, c: np.ndarray, rcov: np.ndarray, sysb: SystemBatch
    ) -> np.ndarray | None:
        """OLS covariance (independent rows assumed; see the notes of the fit)."""
        Z = np.asarray(d.Z, dtype=float)
        eq = d.info["equilibrium"]
        if eq is None:
            Z = np.column_stack([Z, np.ones(Z.shape[0])])
        return regression_covariance(Z, rcov, eq)

    def notes(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        """What derivative was used where, and the caveat of the OLS covariance."""
        counts = d.info["counts"]
        out = []
        parts = [f"{counts[k]} segment(s) by {k}" for k in DERIVATIVES if counts[k]]
        out.append("derivatives: " + ", ".join(parts))
        smoothed = counts["savgol"] + counts["local"]
        if d.info["window"] is not None and smoothed:
            how = (
                " (chosen by generalized cross-validation)"
                if self.settings["window"] is None
                else ""
            )
            out.append(
                f"local polynomial window {d.info['window']} samples{how}, degree "
                f"{self.settings['polyorder']}"
            )
        if counts[None]:
            out.append(
                f"{counts[None]} segment(s) shorter than {_MIN_SEGMENT} samples left out "
                f"({d.info['skipped_samples']} sample(s))"
            )
        smooth_used = d.info["smooth_states"] and (smoothed or counts["spline"])
        out.append("regressors: smoothed states" if smooth_used else "regressors: the raw samples")
        if smoothed or counts["spline"]:
            out.append(
                "the parameter covariance assumes independent rows; smoothed derivatives "
                "are correlated over the smoothing window, so it understates the "
                "uncertainty; prefer block-bootstrap intervals"
            )
        return out

    def warnings(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        """Segments that fell back from the requested derivative."""
        req = self.settings["derivative"]
        counts = d.info["counts"]
        out = []
        if req in ("savgol", "local", "spline") and counts["fd"]:
            out.append(
                f"{counts['fd']} segment(s) were too short for '{req}' and used finite differences"
            )
        if req == "savgol" and counts["local"]:
            out.append(
                f"{counts['local']} segment(s) have irregular steps: the local polynomial "
                "fits were made on their own times instead of the Savitzky-Golay filter"
            )
        return out

    def extra(
        self, rec: Recording, d: Design, C: np.ndarray, c: np.ndarray, sysb: SystemBatch
    ) -> dict[str, Any]:
        """Derivative used per segment, window, whether the states were smoothed."""
        counts = d.info["counts"]
        return {
            "segment_derivative": list(d.info["kinds"]),
            "segments_by_derivative": {k: counts[k] for k in DERIVATIVES},
            "window": d.info["window"],
            "smooth_states": d.info["smooth_states"],
        }
