"""Batched closed-form linear algebra for 2x2 real matrices.

Every function takes arrays of shape ``(..., 2, 2)`` (any number of leading batch
axes) and works element-wise over the batch without a Python loop.  The formulas use
the split ``A = s I + M`` with ``s = tr(A) / 2`` and the trace-free part ``M``, whose
square is ``q I`` with ``q = ((a - d) / 2)^2 + b c`` (a quarter of the
discriminant).  Any primary matrix function is then ``f(A) = f0 I + f1 M`` with

    f0 = (f(s + r) + f(s - r)) / 2,   f1 = (f(s + r) - f(s - r)) / (2 r),  r = sqrt(q),

evaluated in real arithmetic for both signs of ``q`` (for ``q < 0`` the pair is
complex and ``r`` imaginary), with series where ``r`` is small so that repeated and
nearly repeated eigenvalues lose no accuracy (Sylvester's formula; Higham,
*Functions of Matrices*, 2008, ch. 1).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "invariants",
    "eigvals",
    "eigvecs",
    "expm",
    "logm",
    "has_real_log",
    "inv",
    "solve",
    "sort_eigenvalues",
    "phi1",
    "expm_integral",
    "phi1_parts",
    "phi1_frechet",
    "expm_parts",
]

_SMALL = 1e-4  # below this |x| the series branches are used (error ~ x^4 / 45)
_CUT_TOL = 8.0 * np.finfo(float).eps  # relative distance counted as on the branch cut


def _parts(A: np.ndarray) -> tuple[np.ndarray, ...]:
    A = np.asarray(A, dtype=float)
    if A.shape[-2:] != (2, 2):
        raise ValueError(f"expected arrays of shape (..., 2, 2), got {A.shape}")
    return A[..., 0, 0], A[..., 0, 1], A[..., 1, 0], A[..., 1, 1]


def invariants(A: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Trace, determinant and discriminant of 2x2 matrices.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)

    Returns
    -------
    trace, det, disc : ndarray, shape (...)
        ``disc = trace**2 - 4 det``, computed as ``(a - d)**2 + 4 b c`` which avoids
        the cancellation of the textbook form when the eigenvalues are close.
    """
    a, b, c, d = _parts(A)
    return a + d, a * d - b * c, (a - d) ** 2 + 4.0 * b * c


def _split(A: np.ndarray):
    a, b, c, d = _parts(A)
    s = 0.5 * (a + d)
    h = 0.5 * (a - d)
    q = h * h + b * c
    M = np.asarray(A, dtype=float) - s[..., None, None] * np.eye(2)
    return s, q, M


def _combine(f0: np.ndarray, f1: np.ndarray, M: np.ndarray) -> np.ndarray:
    return f0[..., None, None] * np.eye(2) + f1[..., None, None] * M


def sort_eigenvalues(lam: np.ndarray) -> np.ndarray:
    """Sort eigenvalue pairs: larger real part first, then positive imaginary first.

    Parameters
    ----------
    lam : complex ndarray, shape (..., 2)

    Returns
    -------
    complex ndarray, shape (..., 2)
    """
    lam = np.asarray(lam, dtype=complex)
    swap = (lam[..., 1].real > lam[..., 0].real) | (
        (lam[..., 1].real == lam[..., 0].real) & (lam[..., 1].imag > lam[..., 0].imag)
    )
    out = lam.copy()
    out[swap, 0] = lam[swap, 1]
    out[swap, 1] = lam[swap, 0]
    return out


def eigvals(A: np.ndarray) -> np.ndarray:
    """Eigenvalues of 2x2 real matrices, sorted.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)

    Returns
    -------
    complex ndarray, shape (..., 2)
        Larger real part first; for a complex pair the one with positive imaginary
        part first.  The smaller-magnitude real root is computed from the
        determinant to avoid cancellation.
    """
    a, b, c, d = _parts(A)
    s = 0.5 * (a + d)
    h = 0.5 * (a - d)
    q = h * h + b * c
    det = a * d - b * c
    r = np.sqrt(np.abs(q))
    real = q >= 0
    # real pair: big = s + sign(s) r has no cancellation; small = det / big
    big = s + np.copysign(r, s)
    with np.errstate(divide="ignore", invalid="ignore"):
        small = np.where(big != 0, det / np.where(big != 0, big, 1.0), s - np.copysign(r, s))
    hi = np.maximum(big, small)
    lo = np.minimum(big, small)
    lam = np.empty(np.shape(s) + (2,), dtype=complex)
    lam[..., 0] = np.where(real, hi, s) + 1j * np.where(real, 0.0, r)
    lam[..., 1] = np.where(real, lo, s) - 1j * np.where(real, 0.0, r)
    return lam


def eigvecs(A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Eigenvalues and unit eigenvectors of 2x2 real matrices.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)

    Returns
    -------
    lam : complex ndarray, shape (..., 2)
        As :func:`eigvals`.
    V : complex ndarray, shape (..., 2, 2)
        ``V[..., :, k]`` is a unit eigenvector for ``lam[..., k]`` (real-valued for
        real eigenvalues).  For a multiple of the identity the standard basis is
        returned; for a defective matrix both columns are the one eigenvector.
        Each vector's largest-magnitude component is made real and positive.
    """
    A = np.asarray(A, dtype=float)
    a, b, c, d = _parts(A)
    lam = eigvals(A)
    V = np.empty(np.shape(a) + (2, 2), dtype=complex)
    scale = np.maximum(np.abs(A).reshape(A.shape[:-2] + (4,)).max(axis=-1), 1e-300)
    for k in range(2):
        lk = lam[..., k]
        # two candidates from the rows of (A - lam I); keep the larger one
        v1 = np.stack([b + 0j, lk - a], axis=-1)
        v2 = np.stack([lk - d, c + 0j], axis=-1)
        n1 = np.linalg.norm(v1, axis=-1)
        n2 = np.linalg.norm(v2, axis=-1)
        v = np.where((n1 >= n2)[..., None], v1, v2)
        n = np.maximum(n1, n2)
        degenerate = n <= 1e-14 * scale
        e = np.zeros_like(v)
        e[..., k] = 1.0
        v = np.where(degenerate[..., None], e, v / np.where(n > 0, n, 1.0)[..., None])
        # fix the phase: largest component real positive
        idx = np.argmax(np.abs(v), axis=-1)
        pivot = np.take_along_axis(v, idx[..., None], axis=-1)
        phase = pivot / np.abs(np.where(pivot == 0, 1.0, pivot))
        phase = np.where(np.abs(pivot) == 0, 1.0, phase)
        v = v / phase
        V[..., :, k] = v
    return lam, V


def _sinhc(x: np.ndarray) -> np.ndarray:
    """sinh(x) / x, accurate near 0."""
    x = np.asarray(x, dtype=float)
    small = np.abs(x) < _SMALL
    xs = np.where(small, 1.0, x)
    return np.where(small, 1.0 + x * x / 6.0, np.sinh(xs) / xs)


def _sinc(x: np.ndarray) -> np.ndarray:
    """sin(x) / x, accurate near 0."""
    x = np.asarray(x, dtype=float)
    small = np.abs(x) < _SMALL
    xs = np.where(small, 1.0, x)
    return np.where(small, 1.0 - x * x / 6.0, np.sin(xs) / xs)


def expm(A: np.ndarray, t: np.ndarray | float = 1.0) -> np.ndarray:
    """Matrix exponential ``expm(A t)`` of 2x2 real matrices in closed form.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)
    t : float or ndarray broadcastable against ``A.shape[:-2]``
        Time step(s); the result has the broadcast batch shape.

    Returns
    -------
    ndarray, shape (..., 2, 2)
    """
    A = np.asarray(A, dtype=float)
    t = np.asarray(t, dtype=float)
    if t.ndim:
        A = A * t[..., None, None]
    elif t != 1.0:
        A = A * float(t)
    s, q, M = _split(A)
    r = np.sqrt(np.abs(q))
    pos = q >= 0
    # real pair: for large r combine exponentials of the eigenvalues directly, which
    # stays finite for stiff steps where exp(s) alone would underflow
    large = pos & (r >= 1.0)
    rl = np.where(large, r, 1.0)
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        ep = np.exp(s + rl)
        em = np.exp(s - rl)
        f0_large = 0.5 * (ep + em)
        f1_large = 0.5 * (ep - em) / rl
        es = np.exp(s)
        f0_real = es * np.cosh(np.where(large, 0.0, r))
        f1_real = es * _sinhc(np.where(large, 0.0, r))
        f0_cplx = es * np.cos(r)
        f1_cplx = es * _sinc(r)
    f0 = np.where(pos, np.where(large, f0_large, f0_real), f0_cplx)
    f1 = np.where(pos, np.where(large, f1_large, f1_real), f1_cplx)
    out = _combine(f0, f1, M)
    # well-separated real pair: the diagonal f0 +- f1 h equals
    # (e^l1 (r +- h) + e^l2 (r -+ h)) / (2 r); forming r - |h| as b c / (r + |h|) keeps
    # it free of cancellation, so e.g. expm(diag(-1, -50)) is exact entry by entry
    h = M[..., 0, 0]
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        u = rl + np.abs(h)
        v = M[..., 0, 1] * M[..., 1, 0] / u
        p = np.where(h >= 0, u, v)  # r + h
        m = np.where(h >= 0, v, u)  # r - h
        d11 = (ep * p + em * m) / (2.0 * rl)
        d22 = (ep * m + em * p) / (2.0 * rl)
    out[..., 0, 0] = np.where(large, d11, out[..., 0, 0])
    out[..., 1, 1] = np.where(large, d22, out[..., 1, 1])
    return out


def has_real_log(F: np.ndarray) -> np.ndarray:
    """Whether each 2x2 real matrix has a real principal logarithm.

    True unless an eigenvalue lies on the closed negative real axis (zero included)
    (Higham, *Functions of Matrices*, 2008, thm 1.31).  A complex pair with negative
    real part counts as on that axis when a change of the entries of relative size
    ``_CUT_TOL`` (a few rounding units) would make it real: there the principal
    logarithm is discontinuous, so its value would be decided by rounding (e.g. a
    rotation by ``np.pi``, whose computed entries leave an imaginary part 1e-16).

    Parameters
    ----------
    F : ndarray, shape (..., 2, 2)

    Returns
    -------
    bool ndarray, shape (...)
    """
    a, b, c, d = _parts(F)
    s, q, _ = _split(F)
    h = 0.5 * (a - d)
    with np.errstate(invalid="ignore", over="ignore"):
        # real pair: both eigenvalues positive
        real_ok = (s > 0) & (a * d - b * c > 0)
        # complex pair s +- i r within rounding of the negative real axis, where the
        # principal logarithm jumps by 2 pi i: |q| / (|grad q| + r) estimates the
        # smallest change of the entries that makes the pair real
        r = np.sqrt(np.abs(q))
        gap = np.abs(q) / (np.sqrt(2.0 * h * h + b * b + c * c) + r)
        fro = np.sqrt(a * a + b * b + c * c + d * d)
        on_cut = (s < 0) & (gap <= _CUT_TOL * fro)
    return np.where(q >= 0, real_ok, ~on_cut) & np.isfinite(s) & np.isfinite(q)


def logm(F: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Principal matrix logarithm of 2x2 real matrices in closed form.

    Parameters
    ----------
    F : ndarray, shape (..., 2, 2)

    Returns
    -------
    L : ndarray, shape (..., 2, 2)
        The real principal logarithm; NaN where it does not exist.
    valid : bool ndarray, shape (...)
        False where ``F`` has an eigenvalue on the closed negative real axis (then
        no real principal logarithm exists; see :func:`has_real_log`).

    Notes
    -----
    With ``F = s I + M`` and ``M^2 = q I``: for a real positive pair
    (``q = r^2``, ``s > r``) ``log F = log(det F) / 2 I + atanh(r / s) / r M``;
    for a complex pair ``s +- i w`` (``q = -w^2``)
    ``log F = log(det F) / 2 I + atan2(w, s) / w M``; for a repeated eigenvalue
    ``mu`` this tends to ``log(mu) I + M / mu``.
    """
    F = np.asarray(F, dtype=float)
    s, q, M = _split(F)
    a, b, c, d = _parts(F)
    det = a * d - b * c
    valid = has_real_log(F)
    r = np.sqrt(np.abs(q))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ss = np.where(valid & (s != 0), s, 1.0)
        x = r / np.abs(ss)
        small = x < _SMALL
        xs = np.where(small, 0.5, x)
        # real pair: atanh(x)/x / s for x <= 1/2; beyond, (log l1 - log l2) / (2 r)
        # with l2 = det / l1 (no cancellation, any eigenvalue ratio); complex pair:
        # atan2(r, s)/r
        g_real = np.where(small, 1.0 + x * x / 3.0, np.arctanh(np.minimum(xs, 0.5)) / xs)
        far = (q >= 0) & valid & (x > 0.5)
        l1 = np.where(far, ss + r, 1.0)
        log1 = np.log(l1)
        log2 = np.log(np.where(far, det, 1.0) / l1)
        r_far = np.where(far, r, 1.0)
        f1_real = np.where(far, (log1 - log2) / (2.0 * r_far), g_real / ss)
        g_cplx_small = (1.0 - x * x / 3.0) / ss  # valid for s > 0, tiny r
        rr = np.where(r > 0, r, 1.0)
        f1_cplx = np.where(small & (s > 0), g_cplx_small, np.arctan2(r, s) / rr)
        f1 = np.where(q >= 0, f1_real, f1_cplx)
        f0 = 0.5 * np.log(np.where(valid, det, 1.0))
    L = _combine(f0, f1, M)
    # far-apart real pair: diagonal without cancellation, as in expm
    h = M[..., 0, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        u = r_far + np.abs(h)
        v = M[..., 0, 1] * M[..., 1, 0] / u
        p = np.where(h >= 0, u, v)  # r + h
        m = np.where(h >= 0, v, u)  # r - h
        L[..., 0, 0] = np.where(far, (log1 * p + log2 * m) / (2.0 * r_far), L[..., 0, 0])
        L[..., 1, 1] = np.where(far, (log1 * m + log2 * p) / (2.0 * r_far), L[..., 1, 1])
    L = np.where(valid[..., None, None], L, np.nan)
    return L, valid


def inv(A: np.ndarray) -> np.ndarray:
    """Inverse of 2x2 matrices by the adjugate (inf/nan where singular)."""
    a, b, c, d = _parts(A)
    det = a * d - b * c
    adj = np.stack([np.stack([d, -b], -1), np.stack([-c, a], -1)], -2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return adj / det[..., None, None]


def solve(A: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Solve ``A x = y`` for 2x2 ``A`` (shape (..., 2, 2)) and ``y`` (shape (..., 2))."""
    return np.einsum("...ij,...j->...i", inv(A), np.asarray(y, dtype=float))


_PHI_TAYLOR = 14  # Taylor degree of phi1 on the scaled pair (error < 0.5^15 / 16!)


def phi1(A: np.ndarray, t: np.ndarray | float = 1.0) -> np.ndarray:
    """The matrix function ``phi1(A t) = sum_k (A t)^k / (k + 1)!`` of 2x2 real matrices.

    ``phi1(X) = X^{-1} (expm(X) - I)`` when ``X`` is invertible, and it stays finite
    and accurate when ``X`` is singular or nearly so; ``t * phi1(A t)`` is the
    integral of ``expm(A s)`` over ``0 <= s <= t`` (see :func:`expm_integral`).

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)
    t : float or ndarray broadcastable against ``A.shape[:-2]``

    Returns
    -------
    ndarray, shape (..., 2, 2)

    Notes
    -----
    Like every function of this module, ``phi1(X) = f0 I + f1 M`` with ``X = s I + M``
    and ``M^2 = q I``; ``f0`` and ``f1`` depend on ``s`` and ``q`` only.  They are
    computed in the two-dimensional algebra spanned by ``I`` and ``M``: a Taylor
    polynomial of ``X / 2^k`` (``k`` chosen per matrix so that its eigenvalues are at
    most 0.5 in modulus), then ``k`` doublings
    ``phi1(2 Y) = (I + expm(Y)) phi1(Y) / 2`` with ``expm(Y) = I + Y phi1(Y)``
    (scaling and squaring; Higham, *Functions of Matrices*, 2008, ch. 10).  No
    cancellation occurs for repeated, nearly repeated, zero or complex eigenvalues.
    """
    A = np.asarray(A, dtype=float)
    t = np.asarray(t, dtype=float)
    if t.ndim:
        A = A * t[..., None, None]
    elif t != 1.0:
        A = A * float(t)
    s, q, M = _split(A)
    with np.errstate(over="ignore", invalid="ignore"):
        nu = np.abs(s) + np.sqrt(np.abs(q))
        k = np.where(
            np.isfinite(nu) & (nu > 0.5), np.ceil(np.log2(np.where(nu > 0.5, nu, 1.0) / 0.5)), 0
        ).astype(int)
        scale = np.ldexp(1.0, -k)
        ss = s * scale  # scaled pair: X' = ss I + M', M' = scale M, M'^2 = qq I
        qq = q * scale * scale
        # Horner: P = sum_j X'^j / (j + 1)!, pairs (a, c) stand for a I + c M'
        fact = [1.0]
        for j in range(1, _PHI_TAYLOR + 2):
            fact.append(fact[-1] * j)
        a = np.full(np.shape(s), 1.0 / fact[_PHI_TAYLOR + 1])
        c = np.zeros(np.shape(s))
        for j in range(_PHI_TAYLOR - 1, -1, -1):
            a, c = a * ss + qq * c + 1.0 / fact[j + 1], a + c * ss
        # doublings; each one also doubles M' (so c is halved when re-expressed)
        for level in range(int(k.max()) if k.size else 0):
            todo = level < k
            # E = I + X' P
            ea = 1.0 + ss * a + qq * c
            ec = a + ss * c
            # P2 = (I + E) P / 2 in the basis of M', then M'' = 2 M'
            na = 0.5 * ((1.0 + ea) * a + qq * ec * c)
            nc = 0.5 * ((1.0 + ea) * c + ec * a)
            a = np.where(todo, na, a)
            c = np.where(todo, 0.5 * nc, c)
            ss = np.where(todo, 2.0 * ss, ss)
            qq = np.where(todo, 4.0 * qq, qq)
    # back in the basis of M: a I + c M' with M' = M (all doublings done)
    return _combine(a, c, M)


def expm_integral(A: np.ndarray, t: np.ndarray | float = 1.0) -> np.ndarray:
    """The integral of ``expm(A s)`` over ``0 <= s <= t``, i.e. ``t * phi1(A t)``.

    This maps the constant ``b`` of ``dx/dt = A x + b`` to the constant
    ``g = expm_integral(A, h) b`` of the exact one-step form
    ``x(t + h) = expm(A h) x(t) + g``; it is invertible whenever ``A h`` has no
    eigenvalue ``2 pi i k`` with ``k != 0`` (always on the principal branch of the
    logarithm), singular ``A`` included.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)
    t : float or ndarray broadcastable against ``A.shape[:-2]``

    Returns
    -------
    ndarray, shape (..., 2, 2)
    """
    t_arr = np.asarray(t, dtype=float)
    return phi1(A, t_arr) * (t_arr[..., None, None] if t_arr.ndim else float(t_arr))


def phi1_parts(X: np.ndarray) -> tuple[np.ndarray, ...]:
    """``phi1(X) = a I + c M`` and the partial derivatives of ``a`` and ``c``.

    With ``X = s I + M`` and ``M^2 = q I``, the coefficients ``a`` and ``c`` of
    :func:`phi1` depend on ``s`` and ``q`` only.  They are computed by the same
    Taylor polynomial and doublings as :func:`phi1`, differentiated step by step
    (forward-mode differentiation of the recurrences), so their derivatives keep
    the accuracy of :func:`phi1` for repeated, zero and complex eigenvalues.

    Parameters
    ----------
    X : ndarray, shape (..., 2, 2)

    Returns
    -------
    s, h, q, a, c, a_s, a_q, c_s, c_q : ndarray, shape (...)
        ``s = tr X / 2``, ``h = (x11 - x22) / 2``, ``q = h^2 + x12 x21``, the
        coefficients and their derivatives with respect to ``s`` and ``q``.
    """
    X = np.asarray(X, dtype=float)
    s, q, _ = _split(X)
    h = 0.5 * (X[..., 0, 0] - X[..., 1, 1])
    with np.errstate(over="ignore", invalid="ignore"):
        nu = np.abs(s) + np.sqrt(np.abs(q))
        k = np.where(
            np.isfinite(nu) & (nu > 0.5), np.ceil(np.log2(np.where(nu > 0.5, nu, 1.0) / 0.5)), 0
        ).astype(int)
        scale = np.ldexp(1.0, -k)
        ss = s * scale
        qq = q * scale * scale
        dss = scale  # d ss / d s
        dqq = scale * scale  # d qq / d q
        fact = [1.0]
        for j in range(1, _PHI_TAYLOR + 2):
            fact.append(fact[-1] * j)
        shape = np.shape(s)
        a = np.full(shape, 1.0 / fact[_PHI_TAYLOR + 1])
        c = np.zeros(shape)
        a_s, a_q, c_s, c_q = (np.zeros(shape) for _ in range(4))
        for j in range(_PHI_TAYLOR - 1, -1, -1):
            a_s, a_q, c_s, c_q = (
                a_s * ss + a * dss + qq * c_s,
                a_q * ss + dqq * c + qq * c_q,
                a_s + c_s * ss + c * dss,
                a_q + c_q * ss,
            )
            a, c = a * ss + qq * c + 1.0 / fact[j + 1], a + c * ss
        for level in range(int(k.max()) if k.size else 0):
            todo = level < k
            ea = 1.0 + ss * a + qq * c
            ea_s = dss * a + ss * a_s + qq * c_s
            ea_q = ss * a_q + dqq * c + qq * c_q
            ec = a + ss * c
            ec_s = a_s + dss * c + ss * c_s
            ec_q = a_q + ss * c_q
            na = 0.5 * ((1.0 + ea) * a + qq * ec * c)
            na_s = 0.5 * (ea_s * a + (1.0 + ea) * a_s + qq * (ec_s * c + ec * c_s))
            na_q = 0.5 * (ea_q * a + (1.0 + ea) * a_q + dqq * ec * c + qq * (ec_q * c + ec * c_q))
            nc = 0.5 * ((1.0 + ea) * c + ec * a)
            nc_s = 0.5 * (ea_s * c + (1.0 + ea) * c_s + ec_s * a + ec * a_s)
            nc_q = 0.5 * (ea_q * c + (1.0 + ea) * c_q + ec_q * a + ec * a_q)
            a = np.where(todo, na, a)
            a_s = np.where(todo, na_s, a_s)
            a_q = np.where(todo, na_q, a_q)
            c = np.where(todo, 0.5 * nc, c)
            c_s = np.where(todo, 0.5 * nc_s, c_s)
            c_q = np.where(todo, 0.5 * nc_q, c_q)
            ss = np.where(todo, 2.0 * ss, ss)
            qq = np.where(todo, 4.0 * qq, qq)
            dss = np.where(todo, 2.0 * dss, dss)
            dqq = np.where(todo, 4.0 * dqq, dqq)
    return s, h, q, a, c, a_s, a_q, c_s, c_q


def phi1_frechet(X: np.ndarray, E: np.ndarray) -> np.ndarray:
    """Frechet derivative of :func:`phi1` of 2x2 matrices: ``d/de phi1(X + e E)`` at 0.

    Parameters
    ----------
    X : ndarray, shape (..., 2, 2)
    E : ndarray, broadcastable against ``X``
        The direction.

    Returns
    -------
    ndarray, the broadcast shape of ``X`` and ``E``

    Notes
    -----
    ``phi1(X) = a I + c M`` with ``a``, ``c`` functions of ``s`` and ``q``
    (:func:`phi1_parts`), so the derivative is ``(a_s ds + a_q dq) I + (c_s ds +
    c_q dq) M + c dM`` with ``ds = tr E / 2``, ``dM = E - ds I`` and ``dq = 2 h dh +
    x12 e21 + x21 e12``.
    """
    X = np.asarray(X, dtype=float)
    E = np.asarray(E, dtype=float)
    s, h, _, _, c, a_s, a_q, c_s, c_q = phi1_parts(X)
    ds = 0.5 * (E[..., 0, 0] + E[..., 1, 1])
    dh = 0.5 * (E[..., 0, 0] - E[..., 1, 1])
    dq = 2.0 * h * dh + X[..., 0, 1] * E[..., 1, 0] + X[..., 1, 0] * E[..., 0, 1]
    alpha = a_s * ds + a_q * dq
    beta = c_s * ds + c_q * dq
    M = X - s[..., None, None] * np.eye(2)
    dM = E - ds[..., None, None] * np.eye(2)
    return alpha[..., None, None] * np.eye(2) + beta[..., None, None] * M + c[..., None, None] * dM


def expm_parts(X: np.ndarray) -> tuple[np.ndarray, ...]:
    """``expm(X) = f0 I + f1 M`` and ``g = d f1 / d q``, each branch computed only where used.

    The same quantities as the closed form behind
    :func:`fitdyn.estimators.prediction.frechet_expm` (``X = s I + M``, ``M^2 = q I``,
    ``f0 = e^s cosh r``, ``f1 = e^s sinh(r) / r``, ``g = e^s (r cosh r - sinh r) /
    (2 r^3)``, ``r = sqrt q``, trigonometric for ``q < 0``), but each element pays
    only for its own branch (two transcendental functions instead of a dozen),
    which matters for the output-error fit's (replicates x samples) batches.

    Parameters
    ----------
    X : ndarray, shape (..., 2, 2)

    Returns
    -------
    s, h, q, f0, f1, g : ndarray, shape (...)
        ``s = tr X / 2``, ``h = (x11 - x22) / 2``, ``q = h^2 + x12 x21``.
    """
    X = np.asarray(X, dtype=float)
    a, b, c, d = _parts(X)
    s = 0.5 * (a + d)
    h = 0.5 * (a - d)
    q = h * h + b * c
    f0 = np.empty_like(s)
    f1 = np.empty_like(s)
    g = np.empty_like(s)
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        small = np.abs(q) < 1e-2
        neg = (q < 0) & ~small
        pos = (q >= 0) & ~small
        other = ~(small | neg | pos)  # NaN: neither branch
        # one branch for nearly every element (the usual case: the sign of q is that
        # of the matrix, whatever the time factor; only times near zero fall in the
        # series branch): that branch on everything, the few others by indexing
        if not np.any(pos) or not np.any(neg):
            if np.any(neg):
                r = np.sqrt(-q)
                es = np.exp(s)
                co, si = np.cos(r), np.sin(r)
                f0, f1, g = es * co, es * si / r, es * (si - r * co) / (2.0 * r**3)
            else:
                r = np.sqrt(q)
                ep = np.exp(s + r)
                em = np.exp(s - r)
                f0, f1 = 0.5 * (ep + em), 0.5 * (ep - em) / r
                g = ((r - 1.0) * ep + (r + 1.0) * em) / (4.0 * r**3)
            neg = pos = np.zeros(q.shape, dtype=bool)
        f0[other] = f1[other] = g[other] = np.nan
        if np.any(small):
            qs, es = q[small], np.exp(s[small])
            f0[small] = es * (1.0 + qs / 2.0 + qs * qs / 24.0 + qs**3 / 720.0 + qs**4 / 40320.0)
            f1[small] = es * (1.0 + qs / 6.0 + qs * qs / 120.0 + qs**3 / 5040.0 + qs**4 / 362880.0)
            g[small] = es * (1.0 / 6.0 + qs / 60.0 + qs * qs / 1680.0 + qs**3 / 90720.0)
        if np.any(neg):
            r = np.sqrt(-q[neg])
            es = np.exp(s[neg])
            co, si = np.cos(r), np.sin(r)
            f0[neg] = es * co
            f1[neg] = es * si / r
            g[neg] = es * (si - r * co) / (2.0 * r**3)
        if np.any(pos):
            r = np.sqrt(q[pos])
            ep = np.exp(s[pos] + r)
            em = np.exp(s[pos] - r)
            f0[pos] = 0.5 * (ep + em)
            f1[pos] = 0.5 * (ep - em) / r
            g[pos] = ((r - 1.0) * ep + (r + 1.0) * em) / (4.0 * r**3)
    return s, h, q, f0, f1, g
