"""Tests of the batched closed-form 2x2 linear algebra in fitdyn.linalg2.

External references (named beside each check): ``scipy.linalg.expm``,
``scipy.linalg.logm``, ``scipy.linalg.eig``, ``numpy.linalg.eig`` / ``eigvals`` /
``inv`` / ``solve``; closed forms for Jordan blocks and rotations (any linear algebra
text; common practice, no source).  An extended-precision (``np.longdouble``) Taylor
series with scaling and squaring serves as a tighter yardstick for ``expm`` than scipy,
whose own error grows with the norm.

Accuracy achieved (normwise relative error, Frobenius; worst case over the random
batches, median ~2e-16 throughout): eigenvalues 1.3e-15 of max |a_ij| (numpy);
expm 4e-16, 4e-15, 1.2e-13 against the extended-precision reference at ||A|| ~ 1, 10,
100, while scipy's own error there is 4e-13, 3e-12, 5e-11 (so the scipy comparison
is asserted at 1e-12 to 1e-10); logm 3e-14 against scipy (plus eps ||F|| near I, the
conditioning limit); round trips logm(expm(A)) 1e-12 and expm(logm(F)) 5e-12 in the
worst of 20000 random draws.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.linalg
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from fitdyn import linalg2

SCALES = [1e-6, 1e-3, 1.0, 10.0, 1e3]


def _fro(X: np.ndarray) -> np.ndarray:
    return np.sqrt(np.sum(np.abs(X) ** 2, axis=(-2, -1)))


def _rel(X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Normwise relative difference of matrix batches."""
    return _fro(X - Y) / np.maximum(_fro(Y), 1e-300)


def _rot(theta: float) -> np.ndarray:
    return np.array([[np.cos(theta), -np.sin(theta)], [np.sin(theta), np.cos(theta)]])


def _with_eigs(lam1: float, lam2: float, V: np.ndarray | None = None) -> np.ndarray:
    """Real matrix V diag(lam1, lam2) V^-1 with a fixed, non-orthogonal basis."""
    V = np.array([[1.0, 0.3], [-0.4, 1.0]]) if V is None else V
    return V @ np.diag([lam1, lam2]) @ np.linalg.inv(V)


def _with_pair(re: float, im: float) -> np.ndarray:
    """Real matrix with eigenvalues re +- i im in a fixed, non-orthogonal basis."""
    V = np.array([[1.0, 0.3], [-0.4, 1.0]])
    return V @ np.array([[re, -im], [im, re]]) @ np.linalg.inv(V)


def _scipy_logm(F: np.ndarray) -> np.ndarray:
    """scipy.linalg.logm over a batch (scipy's logm takes one matrix at a time)."""
    flat = F.reshape(-1, 2, 2)
    out = np.empty(flat.shape, dtype=complex)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, f in enumerate(flat):
            out[i] = scipy.linalg.logm(f)
    return out.reshape(F.shape)


def _expm_longdouble(A: np.ndarray) -> np.ndarray:
    """Extended-precision reference: Taylor degree 24 of A / 2^k, then k squarings."""
    X = np.asarray(A, dtype=np.longdouble)
    norm = np.max(np.sum(np.abs(X), axis=-1), axis=-1)
    k = int(np.max(np.ceil(np.log2(np.maximum(norm, 1e-300) / 0.01)).clip(0)))
    X = X / np.longdouble(2.0) ** k
    eye = np.broadcast_to(np.eye(2, dtype=np.longdouble), X.shape)
    E = eye.copy()
    T = eye.copy()
    for j in range(1, 25):
        T = (T @ X) / np.longdouble(j)
        E = E + T
    for _ in range(k):
        E = E @ E
    return E.astype(float)


def _random(rng: np.random.Generator, n: int, scale: float) -> np.ndarray:
    return scale * rng.standard_normal((n, 2, 2))


# ---------------------------------------------------------------- input handling


def test_rejects_non_2x2():
    with pytest.raises(ValueError, match=r"\(\.\.\., 2, 2\)"):
        linalg2.eigvals(np.zeros((3, 3)))
    with pytest.raises(ValueError):
        linalg2.expm(np.zeros((4, 2, 3)))


def test_batch_shapes_preserved():
    A = np.random.default_rng(0).standard_normal((3, 4, 2, 2))
    tau, det, disc = linalg2.invariants(A)
    assert tau.shape == det.shape == disc.shape == (3, 4)
    assert linalg2.eigvals(A).shape == (3, 4, 2)
    lam, V = linalg2.eigvecs(A)
    assert lam.shape == (3, 4, 2) and V.shape == (3, 4, 2, 2)
    assert linalg2.expm(A).shape == (3, 4, 2, 2)
    L, valid = linalg2.logm(linalg2.expm(A))
    assert L.shape == (3, 4, 2, 2) and valid.shape == (3, 4)
    assert linalg2.has_real_log(A).shape == (3, 4)
    assert linalg2.inv(A).shape == (3, 4, 2, 2)
    assert linalg2.solve(A, np.ones((3, 4, 2))).shape == (3, 4, 2)
    # single matrix: no batch axes
    assert linalg2.eigvals(A[0, 0]).shape == (2,)
    assert linalg2.expm(A[0, 0]).shape == (2, 2)
    assert linalg2.logm(linalg2.expm(A[0, 0]))[1].shape == ()


# ---------------------------------------------------------------- invariants


def test_invariants_match_numpy():
    # reference: numpy.trace, numpy.linalg.det
    A = np.random.default_rng(1).standard_normal((3, 4, 2, 2)) * 7.0
    tau, det, disc = linalg2.invariants(A)
    np.testing.assert_allclose(tau, np.trace(A, axis1=-2, axis2=-1), rtol=1e-14, atol=1e-13)
    np.testing.assert_allclose(det, np.linalg.det(A), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(disc, tau**2 - 4 * det, rtol=1e-12, atol=1e-11)


def test_discriminant_has_no_cancellation_near_repeated():
    # eigenvalues 1e8 and 1e8 + 1: the textbook tau^2 - 4 det loses everything
    A = np.array([[1e8, 1.0], [0.0, 1e8 + 1.0]])
    assert linalg2.invariants(A)[2] == 1.0


# ---------------------------------------------------------------- eigenvalues


@pytest.mark.parametrize("scale", SCALES)
def test_eigvals_match_numpy_random(scale):
    # reference: numpy.linalg.eigvals (LAPACK geev), sorted by our rule
    rng = np.random.default_rng(2)
    A = _random(rng, 2000, scale).reshape(20, 100, 2, 2)
    ours = linalg2.eigvals(A)
    ref = linalg2.sort_eigenvalues(np.linalg.eigvals(A))
    err = np.max(np.abs(ours - ref), axis=-1) / np.max(np.abs(A), axis=(-2, -1))
    assert np.max(err) < 1e-14


def test_eigvals_sorted_and_conjugate():
    rng = np.random.default_rng(3)
    lam = linalg2.eigvals(_random(rng, 5000, 1.0))
    cplx = lam[:, 0].imag != 0
    # larger real part first
    assert np.all(lam[:, 0].real >= lam[:, 1].real)
    # complex pairs: conjugates, positive imaginary part first
    assert np.all(lam[cplx, 0] == np.conj(lam[cplx, 1]))
    assert np.all(lam[cplx, 0].imag > 0)
    assert cplx.any() and (~cplx).any()


def test_sort_eigenvalues_rule():
    lam = np.array(
        [
            [-3.0 + 0j, 2.0 + 0j],  # swap: larger real part first
            [1 - 2j, 1 + 2j],  # swap: positive imaginary first
            [5.0 + 0j, 5.0 + 0j],  # tie: unchanged
            [-1 + 1j, -1 - 1j],  # already sorted
        ]
    )
    expected = np.array(
        [[2.0, -3.0], [1 + 2j, 1 - 2j], [5.0, 5.0], [-1 + 1j, -1 - 1j]], dtype=complex
    )
    np.testing.assert_array_equal(linalg2.sort_eigenvalues(lam), expected)
    # one pair without batch axes; input left untouched
    one = np.array([1 - 1j, 1 + 1j])
    np.testing.assert_array_equal(linalg2.sort_eigenvalues(one), [1 + 1j, 1 - 1j])
    np.testing.assert_array_equal(one, [1 - 1j, 1 + 1j])
    # idempotent
    s = linalg2.sort_eigenvalues(lam)
    np.testing.assert_array_equal(linalg2.sort_eigenvalues(s), s)


@pytest.mark.parametrize(
    ("A", "expected"),
    [
        # closed forms (common practice, no source)
        (np.diag([2.0, -3.0]), [2.0, -3.0]),
        (-2.5 * np.eye(2), [-2.5, -2.5]),  # repeated (star)
        (np.array([[-1.0, 1.0], [0.0, -1.0]]), [-1.0, -1.0]),  # Jordan block
        (np.array([[0.0, -2.0], [2.0, 0.0]]), [2j, -2j]),  # pure imaginary
        (np.array([[1.0, 2.0], [2.0, 4.0]]), [5.0, 0.0]),  # singular
        (np.zeros((2, 2)), [0.0, 0.0]),
        (np.array([[-1.0, -4.0], [1.0, -1.0]]), [-1 + 2j, -1 - 2j]),
        (np.array([[1e8, 1.0], [0.0, 1e-8]]), [1e8, 1e-8]),  # badly scaled
        (np.array([[-1.0, 1e8], [-1e-8, -1.0]]), [-1 + 1j, -1 - 1j]),
    ],
)
def test_eigvals_edge_cases(A, expected):
    lam = linalg2.eigvals(A)
    np.testing.assert_allclose(lam, np.asarray(expected, dtype=complex), rtol=1e-14, atol=0)


@pytest.mark.parametrize("delta", [1e-9, -1e-9, 1e-13, -1e-13])
def test_eigvals_nearly_defective(delta):
    # [[-1, 1], [delta, -1]] has eigenvalues -1 +- sqrt(delta) exactly (closed form);
    # a perturbation delta of a Jordan block splits the pair by 2 sqrt(delta)
    A = np.array([[-1.0, 1.0], [delta, -1.0]])
    root = np.sqrt(complex(delta))
    expected = linalg2.sort_eigenvalues(np.array([-1 + root, -1 - root]))
    np.testing.assert_allclose(linalg2.eigvals(A), expected, rtol=1e-15, atol=1e-15)
    # reference: numpy.linalg.eigvals, whose error here is ~ eps / sqrt(delta)
    ref = linalg2.sort_eigenvalues(np.linalg.eigvals(A))
    np.testing.assert_allclose(linalg2.eigvals(A), ref, atol=1e-15 / np.sqrt(abs(delta)))


def test_small_root_from_determinant():
    # eigenvalues 1e8 and 1e-8 of a non-diagonal matrix: the small one comes from
    # det / big, not from a cancelling difference
    A = _with_eigs(1e8, 1e-8, V=np.array([[1.0, 0.0], [0.5, 1.0]]))
    lam = linalg2.eigvals(A)
    assert abs(lam[0] - 1e8) < 1e-7
    assert abs(lam[1] - 1e-8) < 1e-15


# ---------------------------------------------------------------- eigenvectors


@pytest.mark.parametrize("scale", SCALES)
def test_eigvecs_equations_random(scale):
    rng = np.random.default_rng(4)
    A = _random(rng, 2000, scale).reshape(40, 50, 2, 2)
    lam, V = linalg2.eigvecs(A)
    np.testing.assert_array_equal(lam, linalg2.eigvals(A))
    # A v = lambda v, to rounding of A
    resid = A.astype(complex) @ V - V * lam[..., None, :]
    bound = 1e-14 * np.max(np.abs(A), axis=(-2, -1))
    assert np.all(np.linalg.norm(resid, axis=-2) <= bound[..., None])
    # unit norm
    np.testing.assert_allclose(np.linalg.norm(V, axis=-2), 1.0, rtol=1e-14)
    # phase: largest-magnitude component real and positive
    idx = np.argmax(np.abs(V), axis=-2)
    pivot = np.take_along_axis(V, idx[..., None, :], axis=-2)[..., 0, :]
    assert np.all(pivot.real > 0) and np.all(pivot.imag == 0)
    # real eigenvalues have real eigenvectors
    real = lam.imag == 0
    assert np.all(np.moveaxis(V, -2, -1)[real].imag == 0)


def test_eigvecs_match_scipy_up_to_phase():
    # reference: scipy.linalg.eig (LAPACK geev); unit vectors agree up to a phase
    rng = np.random.default_rng(5)
    A = _random(rng, 100, 1.0)
    lam, V = linalg2.eigvecs(A)
    for i in range(len(A)):
        w, U = scipy.linalg.eig(A[i])
        for k in range(2):
            j = int(np.argmin(np.abs(w - lam[i, k])))
            overlap = abs(np.vdot(U[:, j], V[i, :, k]))
            assert overlap == pytest.approx(1.0, abs=1e-10)


def test_eigvecs_edge_cases():
    # multiple of the identity: the standard basis
    lam, V = linalg2.eigvecs(3.0 * np.eye(2))
    np.testing.assert_array_equal(V, np.eye(2))
    np.testing.assert_array_equal(lam, [3.0, 3.0])
    # zero matrix: the same
    np.testing.assert_array_equal(linalg2.eigvecs(np.zeros((2, 2)))[1], np.eye(2))
    # Jordan block: both columns the one eigenvector e1
    lam, V = linalg2.eigvecs(np.array([[-2.0, 1.0], [0.0, -2.0]]))
    np.testing.assert_allclose(V, [[1.0, 1.0], [0.0, 0.0]], atol=0)
    # rotation generator: (1, -i)/sqrt(2) for +i (closed form)
    lam, V = linalg2.eigvecs(np.array([[0.0, 1.0], [-1.0, 0.0]]))
    np.testing.assert_allclose(lam, [1j, -1j])
    np.testing.assert_allclose(V[:, 0], np.array([1.0, 1j]) / np.sqrt(2), atol=1e-15)
    np.testing.assert_allclose(V[:, 1], np.array([1.0, -1j]) / np.sqrt(2), atol=1e-15)
    # the slow eigenvector of a node (closed form: A = V diag V^-1)
    B = np.array([[1.0, 1.0], [0.0, 2.0]]) / np.array([1.0, np.sqrt(5.0)])  # unit columns
    A = _with_eigs(-1.0, -5.0, V=B)
    lam, V = linalg2.eigvecs(A)
    np.testing.assert_allclose(lam, [-1.0, -5.0], rtol=1e-14)
    np.testing.assert_allclose(np.abs(V.real), np.abs(B), atol=1e-14)


@pytest.mark.parametrize("delta", [1e-9, -1e-9, 1e-13, -1e-13])
def test_eigvecs_nearly_defective(delta):
    A = np.array([[-1.0, 1.0], [delta, -1.0]])
    lam, V = linalg2.eigvecs(A)
    resid = A @ V - V * lam[None, :]
    assert np.max(np.abs(resid)) < 1e-15
    np.testing.assert_allclose(np.linalg.norm(V, axis=0), 1.0, rtol=1e-15)


# ---------------------------------------------------------------- expm


@pytest.mark.parametrize("scale", SCALES)
def test_expm_matches_scipy_random(scale):
    # reference: scipy.linalg.expm (Pade scaling and squaring, batched input)
    rng = np.random.default_rng(6)
    A = _random(rng, 1000, scale)
    if scale > 10:
        # keep exp finite: shift every matrix so that its rightmost eigenvalue is -1
        A = A - (linalg2.eigvals(A).real.max(axis=-1) + 1.0)[:, None, None] * np.eye(2)
    A = A.reshape(10, 100, 2, 2)
    ours = linalg2.expm(A)
    ref = scipy.linalg.expm(A)
    # scipy's own error grows with ||A|| (see the extended-precision test below)
    tol = {1e-6: 1e-14, 1e-3: 1e-14, 1.0: 1e-12, 10.0: 1e-10, 1e3: 1e-10}[scale]
    assert np.max(_rel(ours, ref)) < tol


@pytest.mark.parametrize("scale", [1e-6, 1.0, 10.0, 100.0])
def test_expm_extended_precision(scale):
    # reference: longdouble Taylor series with scaling and squaring (in this file)
    rng = np.random.default_rng(7)
    A = _random(rng, 300, scale)
    ours = linalg2.expm(A)
    ref = _expm_longdouble(A)
    ok = np.isfinite(ref).all(axis=(-2, -1))
    bound = 1e-14 * np.maximum(1.0, _fro(A))
    assert np.all(_rel(ours, ref)[ok] < bound[ok])


def test_expm_batched_with_t_arrays():
    # reference: scipy.linalg.expm of A * t, broadcast
    rng = np.random.default_rng(8)
    A = rng.standard_normal((3, 4, 2, 2))
    for t in [0.7, np.linspace(0.1, 2.0, 4), rng.uniform(0, 3, (3, 4)), np.array(2.0)]:
        ours = linalg2.expm(A, t)
        tt = np.broadcast_to(np.asarray(t, dtype=float), (3, 4))
        ref = scipy.linalg.expm(A * tt[..., None, None])
        assert ours.shape == (3, 4, 2, 2)
        assert np.max(_rel(ours, ref)) < 1e-12
    # one matrix, many times
    t = np.linspace(0.0, 5.0, 7)
    ours = linalg2.expm(A[0, 0], t)
    assert ours.shape == (7, 2, 2)
    np.testing.assert_allclose(ours[0], np.eye(2), atol=0)
    assert np.max(_rel(ours, scipy.linalg.expm(A[0, 0] * t[:, None, None]))) < 1e-12


@pytest.mark.parametrize("lam", [-3.0, 0.0, 2.0])
@pytest.mark.parametrize("t", [0.5, 1.0, 10.0])
def test_expm_repeated_and_defective(lam, t):
    # closed forms: expm(lam I t) = e^{lam t} I; expm([[lam, 1], [0, lam]] t) =
    # e^{lam t} [[1, t], [0, 1]] (common practice, no source)
    np.testing.assert_allclose(linalg2.expm(lam * np.eye(2), t), np.exp(lam * t) * np.eye(2))
    J = np.array([[lam, 1.0], [0.0, lam]])
    expected = np.exp(lam * t) * np.array([[1.0, t], [0.0, 1.0]])
    np.testing.assert_allclose(linalg2.expm(J, t), expected, rtol=1e-14, atol=0)
    # the lower-triangular form, too
    np.testing.assert_allclose(linalg2.expm(J.T, t), expected.T, rtol=1e-14, atol=0)


@pytest.mark.parametrize("delta", [1e-9, -1e-9, 1e-13, -1e-13, 1e-300])
def test_expm_nearly_defective(delta):
    # reference: scipy.linalg.expm; and continuity to the Jordan closed form
    A = np.array([[-0.5, 1.0], [delta, -0.5]])
    ours = linalg2.expm(A, 2.0)
    assert _rel(ours, scipy.linalg.expm(2.0 * A)) < 1e-14
    jordan = np.exp(-1.0) * np.array([[1.0, 2.0], [0.0, 1.0]])
    assert _rel(ours, jordan) < 10 * abs(delta) + 1e-15


@pytest.mark.parametrize("t", [0.3, 1.0, 100.0, 1e6])
def test_expm_rotation(t):
    # closed form: expm([[0, -w], [w, 0]] t) is the rotation by w t
    w = 1.7
    ours = linalg2.expm(np.array([[0.0, -w], [w, 0.0]]), t)
    np.testing.assert_allclose(ours, _rot(w * t), atol=1e-15 * max(1.0, w * t))
    # reference: scipy.linalg.expm (its error grows with w t)
    if t <= 100:
        np.testing.assert_allclose(
            ours, scipy.linalg.expm(t * np.array([[0, -w], [w, 0.0]])), atol=1e-12
        )


def test_expm_complex_pair_and_singular():
    # reference: scipy.linalg.expm
    for A in [
        _with_pair(-0.3, 2.0),
        _with_pair(0.2, 0.01),
        np.array([[0.0, 1.0], [0.0, 0.0]]),  # nilpotent
        np.array([[1e8, 1.0], [-1e-8, -1e8]]) * 1e-8,
    ]:
        assert _rel(linalg2.expm(A, 1.5), scipy.linalg.expm(1.5 * A)) < 1e-14
    # singular S with S^2 = 5 S (eigenvalues 0 and 5): expm(S t) = I + (e^{5t} - 1) / 5 S
    # (closed form); scipy.linalg.expm is itself off by ~6e-13 here
    S = np.array([[1.0, 2.0], [2.0, 4.0]])
    closed = np.eye(2) + np.expm1(7.5) / 5.0 * S
    assert _rel(linalg2.expm(S, 1.5), closed) < 1e-15
    assert _rel(linalg2.expm(S, 1.5), scipy.linalg.expm(1.5 * S)) < 1e-12
    # closed forms: expm(0) = I; expm(N) = I + N for nilpotent N
    np.testing.assert_array_equal(linalg2.expm(np.zeros((2, 2))), np.eye(2))
    N = np.array([[0.0, 3.0], [0.0, 0.0]])
    np.testing.assert_array_equal(linalg2.expm(N), np.eye(2) + N)


def test_expm_badly_scaled():
    # reference: scipy.linalg.expm; entries 1e8 and 1e-8
    for A in [
        np.array([[-1.0, 1e8], [0.0, -2.0]]),
        np.array([[-1.0, 1e8], [1e-8, -2.0]]),
        np.array([[-1.0, 1e8], [-1e-8, -2.0]]),
        np.array([[1e-8, 1.0], [-1.0, -1e-8]]),
    ]:
        assert _rel(linalg2.expm(A), scipy.linalg.expm(A)) < 1e-13
    # triangular with entry 1e8: closed form [[e^-1, 1e8 (e^-1 - e^-2)], [0, e^-2]]
    ours = linalg2.expm(np.array([[-1.0, 1e8], [0.0, -2.0]]))
    e1, e2 = np.exp(-1.0), np.exp(-2.0)
    np.testing.assert_allclose(ours, [[e1, 1e8 * (e1 - e2)], [0.0, e2]], rtol=1e-15)


def test_expm_stiff():
    # eigenvalues -1000 and -1 at t = 1; reference: scipy.linalg.expm and the
    # spectral form V diag(e^-1000, e^-1) V^-1 (e^-1000 underflows to 0)
    V = np.array([[1.0, 0.3], [-0.4, 1.0]])
    A = _with_eigs(-1000.0, -1.0, V)
    ours = linalg2.expm(A, 1.0)
    assert np.all(np.isfinite(ours))
    assert _rel(ours, scipy.linalg.expm(A)) < 1e-12
    # the spectral form is exact for the unrounded A; rounding A's entries (~900) moves
    # the eigenvalue -1 by ~1e-13, so the bound is 1e-12
    spectral = V @ np.diag([0.0, np.exp(-1.0)]) @ np.linalg.inv(V)
    assert _rel(ours, spectral) < 1e-12
    # for the rounded A itself (extended-precision reference): ~5e-14 achieved; the
    # small eigenvalue -1 = s + r, s = -500.5, carries the rounding of s
    assert _rel(ours, _expm_longdouble(A[None])[0]) < 2e-13
    # diagonal and triangular stiff matrices are exact entry by entry, tiny entries
    # included (closed forms)
    np.testing.assert_allclose(
        linalg2.expm(np.diag([-1.0, -50.0])), np.diag(np.exp([-1.0, -50.0])), rtol=1e-15, atol=0
    )
    T = np.array([[-1.0, 2.0], [0.0, -50.0]])
    expected = [[np.exp(-1.0), 2.0 * (np.exp(-1.0) - np.exp(-50.0)) / 49.0], [0.0, np.exp(-50.0)]]
    np.testing.assert_allclose(linalg2.expm(T), expected, rtol=1e-14, atol=0)
    np.testing.assert_allclose(linalg2.expm(T.T), np.transpose(expected), rtol=1e-14, atol=0)


def test_expm_large_t():
    A = _with_pair(-0.5, 3.0)
    # decays to zero without overflow or NaN
    t = np.array([1e2, 1e3, 1e5])
    F = linalg2.expm(A, t)
    assert np.all(np.isfinite(F))
    # ||expm(A t)|| <= cond(V) e^{-0.5 t} (the basis has cond(V) < 2)
    assert np.all(_fro(F) <= 4.0 * np.exp(-0.5 * t))
    assert np.all(F[2] == 0.0)
    # reference: scipy.linalg.expm at t = 100
    assert _rel(F[0], scipy.linalg.expm(100.0 * A)) < 1e-11
    # a saddle over a long step: grows like e^{t} along one direction; reference:
    # the spectral form
    V = np.array([[1.0, 0.3], [-0.4, 1.0]])
    A = _with_eigs(1.0, -2.0, V)
    t = 300.0
    spectral = V @ np.diag([np.exp(t), 0.0]) @ np.linalg.inv(V)
    assert _rel(linalg2.expm(A, t), spectral) < 1e-13


def test_expm_group_properties():
    # exp(A (s + t)) = exp(A s) exp(A t); exp(-A t) = exp(A t)^-1; det exp = e^tr
    rng = np.random.default_rng(9)
    A = rng.standard_normal((500, 2, 2))
    s, t = 0.7, 1.3
    np.testing.assert_allclose(
        linalg2.expm(A, s + t), linalg2.expm(A, s) @ linalg2.expm(A, t), rtol=1e-12, atol=1e-12
    )
    E = linalg2.expm(A, t)
    np.testing.assert_allclose(
        linalg2.expm(A, -t) @ E, np.broadcast_to(np.eye(2), E.shape), atol=1e-12
    )
    np.testing.assert_allclose(
        np.linalg.det(E), np.exp(t * np.trace(A, axis1=1, axis2=2)), rtol=1e-12
    )


# ---------------------------------------------------------------- logm


@pytest.mark.parametrize("scale", [1e-3, 1.0, 10.0, 1e3])
def test_logm_matches_scipy_random(scale):
    # reference: scipy.linalg.logm (inverse scaling and squaring); real result where
    # a real principal logarithm exists
    rng = np.random.default_rng(10)
    F = _random(rng, 150, scale)
    L, valid = linalg2.logm(F)
    np.testing.assert_array_equal(valid, linalg2.has_real_log(F))
    assert 0.2 < valid.mean() < 0.9  # both kinds present
    ref = _scipy_logm(F[valid])
    assert np.max(np.abs(ref.imag)) < 1e-8 * np.max(_fro(ref))
    assert np.max(_rel(L[valid], ref.real)) < 1e-12
    assert np.all(np.isnan(L[~valid]))


@pytest.mark.parametrize("scale", [1e-6, 1e-3, 1.0])
def test_logm_near_identity(scale):
    # F = expm(A) close to I: the data F carry A only to eps ||F|| (conditioning), so
    # the tolerance is absolute in ||F||. Reference: scipy.linalg.logm
    rng = np.random.default_rng(11)
    A = _random(rng, 100, scale)
    F = linalg2.expm(A)
    L, valid = linalg2.logm(F)
    assert valid.all()
    ref = _scipy_logm(F).real
    bound = 1e-12 * _fro(ref) + 1e-14 * _fro(F)
    assert np.all(_fro(L - ref) <= bound)
    assert np.all(_fro(L - A) <= bound)


@pytest.mark.parametrize(
    ("F", "why"),
    [
        (np.diag([-1.0, 2.0]), "negative real eigenvalue"),
        (-np.eye(2), "-I"),
        (_rot(np.pi), "rotation by exactly pi (computed sin(pi) = 1.2e-16)"),
        (-_rot(1e-17), "rotation by pi, written differently"),
        (np.diag([0.0, 1.0]), "zero eigenvalue"),
        (np.array([[1.0, 2.0], [2.0, 4.0]]), "singular, eigenvalues 0 and 5"),
        (np.zeros((2, 2)), "zero matrix"),
        (np.diag([-1.0, -2.0]), "two negative eigenvalues"),
        (np.array([[-1.0, 1.0], [0.0, -1.0]]), "defective, negative"),
        (np.array([[-1.0, 1.0], [-1e-20, -1.0]]), "complex pair 1e-10 off the negative axis"),
        (np.array([[0.0, 1.0], [1.0, 0.0]]), "eigenvalues +1 and -1"),
        (np.array([[np.nan, 0.0], [0.0, 1.0]]), "NaN"),
    ],
)
def test_logm_no_real_log(F, why):
    L, valid = linalg2.logm(F)
    assert not valid, why
    assert not linalg2.has_real_log(F), why
    assert np.all(np.isnan(L)), why


def test_logm_invalid_entries_do_not_spoil_the_batch():
    good = _with_pair(0.5, 1.0)
    F = np.stack([good, -np.eye(2), np.diag([1.0, 0.0]), good])
    L, valid = linalg2.logm(F)
    np.testing.assert_array_equal(valid, [True, False, False, True])
    ref = scipy.linalg.logm(good).real  # reference: scipy.linalg.logm
    for k in (0, 3):
        assert _rel(L[k], ref) < 1e-14
    assert np.all(np.isnan(L[1:3]))


@pytest.mark.parametrize("gap", [1e-2, 1e-4, 1e-6, 1e-10])
def test_logm_complex_near_negative_axis(gap):
    # eigenvalues 0.8 e^{+-i (pi - gap)}: a real principal logarithm exists,
    # log(0.8 R(pi - gap)) = log(0.8) I + (pi - gap) [[0, -1], [1, 0]] (closed form)
    J = np.array([[0.0, -1.0], [1.0, 0.0]])
    for sign in (1.0, -1.0):
        F = 0.8 * _rot(sign * (np.pi - gap))
        L, valid = linalg2.logm(F)
        assert valid
        closed = np.log(0.8) * np.eye(2) + sign * (np.pi - gap) * J
        np.testing.assert_allclose(L, closed, rtol=0, atol=1e-15)
        # reference: scipy.linalg.logm, whose own error grows like 1e-16 / gap (at
        # gap 1e-10 it even returns an imaginary part of 1e-6), so compare for gap >= 1e-6
        if gap >= 1e-6:
            ref = scipy.linalg.logm(F)
            assert np.max(np.abs(ref.imag)) < 1e-15 / gap
            np.testing.assert_allclose(L, ref.real, rtol=0, atol=1e-15 / gap)
    # the same pair in a non-orthogonal basis: the round trip is exact to rounding
    re, im = 0.8 * np.cos(np.pi - gap), 0.8 * np.sin(np.pi - gap)
    F = _with_pair(re, im)
    L, valid = linalg2.logm(F)
    assert valid
    np.testing.assert_allclose(linalg2.expm(L), F, rtol=0, atol=1e-15)
    np.testing.assert_allclose(
        linalg2.eigvals(L).imag, [np.pi - gap, -(np.pi - gap)], rtol=1e-15 / gap
    )
    if gap >= 1e-6:
        assert _rel(L, scipy.linalg.logm(F).real) < 1e-15 / gap


def test_logm_repeated_and_far_apart():
    # closed forms: log(mu I) = log(mu) I; log([[mu, 1], [0, mu]]) = [[log mu, 1/mu],
    # [0, log mu]]; log(diag) = diag(log) entry by entry (common practice, no source)
    for mu in [1e-8, 0.3, 1.0, 7.0, 1e8]:
        L, valid = linalg2.logm(mu * np.eye(2))
        assert valid
        np.testing.assert_allclose(L, np.log(mu) * np.eye(2), rtol=1e-15, atol=1e-15)
        L, valid = linalg2.logm(np.array([[mu, 1.0], [0.0, mu]]))
        assert valid
        np.testing.assert_allclose(
            L, [[np.log(mu), 1 / mu], [0.0, np.log(mu)]], rtol=1e-14, atol=1e-15
        )
    # eigenvalue ratios far beyond the series region (down to 1e-300)
    for small in [0.4, 1e-3, 1e-12, 1e-14, 1e-100, 1e-300]:
        for big in [1.0, 2.0]:
            L, valid = linalg2.logm(np.diag([big, small]))
            assert valid
            # exact entry by entry (a zero entry may carry 1e-16 when the ratio > 1/3)
            np.testing.assert_allclose(L, np.diag(np.log([big, small])), rtol=1e-15, atol=1e-16)
            L, _ = linalg2.logm(np.diag([small, big]))
            np.testing.assert_allclose(L, np.diag(np.log([small, big])), rtol=1e-15, atol=1e-16)
    # triangular, ratio 1e-13: log [[l1, b], [0, l2]] has the off-diagonal entry
    # b (log l1 - log l2) / (l1 - l2) (closed form); reference: scipy.linalg.logm
    for l1, l2 in [(1.0, 1e-13), (1e-13, 3.0), (2.0, 1e-300)]:
        F = np.array([[l1, 0.5], [0.0, l2]])
        L, valid = linalg2.logm(F)
        assert valid
        closed = [[np.log(l1), 0.5 * (np.log(l1) - np.log(l2)) / (l1 - l2)], [0.0, np.log(l2)]]
        np.testing.assert_allclose(L, closed, rtol=1e-15, atol=1e-16)
        np.testing.assert_allclose(linalg2.logm(F.T)[0], L.T, rtol=1e-15, atol=1e-16)
        if l2 > 1e-20:
            assert _rel(L, scipy.linalg.logm(F).real) < 1e-14
    # dense, ratio 1e-13: rounding F's entries moves the eigenvalue 1e-13 by ~1e-3 of
    # itself, so only the round trip is well-posed (scipy.linalg.logm agrees to 1e-4)
    F = _with_eigs(1.0, 1e-13)
    L, valid = linalg2.logm(F)
    assert valid
    assert _rel(linalg2.expm(L), F) < 1e-15
    assert _rel(L, scipy.linalg.logm(F).real) < 1e-4


@pytest.mark.parametrize("delta", [1e-9, -1e-9, 1e-13, -1e-13])
def test_logm_nearly_defective(delta):
    # reference: scipy.linalg.logm; limit: the Jordan closed form
    F = np.array([[0.6, 1.0], [delta, 0.6]])
    L, valid = linalg2.logm(F)
    assert valid
    ref = scipy.linalg.logm(F)
    np.testing.assert_allclose(L, ref.real, rtol=0, atol=1e-13)
    jordan = np.array([[np.log(0.6), 1 / 0.6], [0.0, np.log(0.6)]])
    np.testing.assert_allclose(L, jordan, rtol=0, atol=10 * abs(delta) + 1e-15)


def test_logm_expm_round_trip_random():
    # logm(expm(A)) = A on the principal branch (|Im lambda| < pi), and
    # expm(logm(F)) = F wherever the real principal logarithm exists
    rng = np.random.default_rng(12)
    A = 2.0 * rng.standard_normal((20, 100, 2, 2))
    ok = np.abs(linalg2.eigvals(A).imag).max(axis=-1) < np.pi - 0.05
    L, valid = linalg2.logm(linalg2.expm(A))
    assert valid[ok].all()
    # median 2e-16; the worst of 20000 such draws is 1e-12 (eigenvalues of A far apart,
    # or |Im| near pi, where the round trip is ill-conditioned)
    assert np.median(_rel(L[ok], A[ok])) < 1e-15
    assert np.max(_rel(L[ok], A[ok])) < 1e-11
    # beyond the branch: the principal logarithm differs from A, but expm undoes it
    assert (~ok).any()
    np.testing.assert_allclose(
        linalg2.expm(L[valid & ~ok]), linalg2.expm(A[valid & ~ok]), rtol=1e-10, atol=1e-12
    )
    F = 3.0 * rng.standard_normal((2000, 2, 2))
    L, valid = linalg2.logm(F)
    # median 2e-16; the worst of 20000 such draws is 5e-12 (F near singular or near the
    # negative real axis)
    assert np.median(_rel(linalg2.expm(L[valid]), F[valid])) < 1e-15
    assert np.max(_rel(linalg2.expm(L[valid]), F[valid])) < 1e-10


def test_logm_frequency_near_nyquist():
    # A with eigenvalues -0.1 +- 3.1i: |Im| < pi, so logm(expm(A)) = A
    A = _with_pair(-0.1, 3.1)
    L, valid = linalg2.logm(linalg2.expm(A))
    assert valid
    assert _rel(L, A) < 1e-12


# ---------------------------------------------------------------- inv / solve


def test_inv_and_solve_match_numpy():
    # reference: numpy.linalg.inv and numpy.linalg.solve
    rng = np.random.default_rng(13)
    A = rng.standard_normal((3, 4, 2, 2))
    y = rng.standard_normal((3, 4, 2))
    np.testing.assert_allclose(linalg2.inv(A), np.linalg.inv(A), rtol=1e-10, atol=1e-12)
    x = linalg2.solve(A, y)
    np.testing.assert_allclose(x, np.linalg.solve(A, y[..., None])[..., 0], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(np.einsum("...ij,...j->...i", A, x), y, atol=1e-10)
    # one right-hand side broadcast over a batch of matrices
    x = linalg2.solve(A, np.array([1.0, -2.0]))
    assert x.shape == (3, 4, 2)


def test_inv_singular_is_not_finite():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Ainv = linalg2.inv(np.array([[1.0, 2.0], [2.0, 4.0]]))
    assert not np.all(np.isfinite(Ainv))


# ---------------------------------------------------------------- properties

_entries = arrays(
    np.float64, (2, 2), elements=st.floats(-2.0, 2.0, allow_nan=False, allow_infinity=False)
)


@settings(deadline=None, max_examples=200, derandomize=True)
@given(_entries)
def test_property_logm_of_expm(A):
    # well-conditioned: principal branch with margin, eigenvalues not too close to
    # the branch where the round trip is ill-conditioned
    lam = linalg2.eigvals(A)
    assume(np.max(np.abs(lam.imag)) < np.pi - 0.1)
    L, valid = linalg2.logm(linalg2.expm(A))
    assert valid
    assert np.linalg.norm(L - A) <= 1e-12 * max(1.0, np.linalg.norm(A))


@settings(deadline=None, max_examples=200, derandomize=True)
@given(_entries, st.floats(0.2, 5.0))
def test_property_expm_of_logm(A, scale):
    # F = c expm(A / 2): entries of A / 2 lie in [-1, 1], so |Im lambda(A / 2)| <= 1 and
    # F's eigenvalues stay well away from the closed negative real axis (no filtering)
    F = scale * linalg2.expm(0.5 * A)
    L, valid = linalg2.logm(F)
    assert valid
    assert np.linalg.norm(linalg2.expm(L) - F) <= 1e-12 * np.linalg.norm(F)
    # the principal branch: eigenvalues of log F have |Im| < pi
    assert np.max(np.abs(linalg2.eigvals(L).imag)) < np.pi


@settings(deadline=None, max_examples=200, derandomize=True)
@given(_entries, st.floats(0.01, 3.0))
def test_property_expm_matches_scipy(A, t):
    # reference: scipy.linalg.expm
    assert _rel(linalg2.expm(A, t), scipy.linalg.expm(A * t)) < 1e-12
