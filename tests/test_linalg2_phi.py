"""Tests of the batched phi1 / integral of expm in fitdyn.linalg2.

Reference: scipy.linalg.expm of Van Loan's block matrix [[A, I], [0, 0]] t, whose
upper-right block is the integral of expm(A s) over [0, t] (Van Loan, "Computing
integrals involving the matrix exponential", IEEE Trans. Automatic Control 23, 1978).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from fitdyn import linalg2


def _reference(A: np.ndarray, t: float) -> np.ndarray:
    # scipy.linalg.expm of the Van Loan block matrix
    M = np.zeros((4, 4))
    M[:2, :2] = A
    M[:2, 2:] = np.eye(2)
    return scipy.linalg.expm(M * t)[:2, 2:]


EDGE = [
    np.zeros((2, 2)),
    np.array([[0.0, 1.0], [0.0, 0.0]]),  # nilpotent
    np.array([[-1.0, 1e3], [0.0, -1.0]]),  # defective, badly scaled
    np.array([[-1.0, 1.0], [1e-12, -1.0]]),  # nearly defective
    np.array([[0.0, 3.0], [-3.0, 0.0]]),  # pure rotation
    np.array([[-50.0, 0.0], [0.0, 1e-9]]),  # stiff and nearly singular
    np.array([[2.0, 1.0], [0.0, 2.0]]),  # repeated, unstable
    np.array([[-200.0, 3.0], [-3.0, -200.0]]),  # stiff spiral
    np.array([[-0.35, 0.30], [0.15, -0.20]]),  # node
    np.array([[0.5, 0.5], [0.5, 0.5]]),  # singular (zero eigenvalue)
]


@pytest.mark.parametrize("A", EDGE)
@pytest.mark.parametrize("t", [0.1, 1.0, 2.5])
def test_expm_integral_edge_cases(A, t):
    ref = _reference(A, t)
    got = linalg2.expm_integral(A, t)
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-12 * max(1.0, np.abs(ref).max()))


def test_expm_integral_random_batch():
    rng = np.random.default_rng(7)
    A = np.concatenate([rng.normal(size=(40, 2, 2)) * s for s in (1e-8, 1e-3, 1.0, 5.0, 30.0)])
    got = linalg2.expm_integral(A, 0.7)
    ref = np.stack([_reference(a, 0.7) for a in A])
    scale = np.abs(ref).max(axis=(1, 2), keepdims=True)
    assert np.all(np.abs(got - ref) <= 1e-10 * scale)


def test_phi1_relations():
    rng = np.random.default_rng(3)
    A = rng.normal(size=(30, 2, 2))
    t = rng.uniform(0.1, 2.0, size=30)
    P = linalg2.phi1(A, t)
    # phi1(X) X = expm(X) - I (definition), with X = A t
    X = A * t[:, None, None]
    np.testing.assert_allclose(P @ X, linalg2.expm(A, t) - np.eye(2), atol=1e-12)
    # t phi1(A t) = integral of expm(A s) over [0, t]
    np.testing.assert_allclose(linalg2.expm_integral(A, t), P * t[:, None, None], rtol=1e-14)
    # phi1(0) = I
    np.testing.assert_array_equal(linalg2.phi1(np.zeros((2, 2))), np.eye(2))


def _phi1_frechet_reference(A: np.ndarray, E: np.ndarray) -> np.ndarray:
    # the derivative of the Van Loan block in direction [[E, 0], [0, 0]], by
    # scipy.linalg.expm_frechet (reference library)
    M = np.zeros((4, 4))
    M[:2, :2] = A
    M[:2, 2:] = np.eye(2)
    D = np.zeros((4, 4))
    D[:2, :2] = E
    return scipy.linalg.expm_frechet(M, D, compute_expm=False)[:2, 2:]


@pytest.mark.parametrize("A", EDGE)
def test_phi1_frechet_against_scipy(A):
    rng = np.random.default_rng(3)
    E = rng.standard_normal((2, 2))
    ref = _phi1_frechet_reference(A, E)
    got = linalg2.phi1_frechet(A, E)
    np.testing.assert_allclose(got, ref, rtol=1e-8, atol=1e-10 * max(1.0, np.abs(ref).max()))


def test_phi1_parts_reproduce_phi1_random_batch():
    rng = np.random.default_rng(4)
    X = rng.standard_normal((500, 2, 2)) * np.exp(rng.uniform(-5, 2.5, (500, 1, 1)))
    s, h, q, a, c, *_ = linalg2.phi1_parts(X)
    M = X - s[:, None, None] * np.eye(2)
    np.testing.assert_allclose(
        a[:, None, None] * np.eye(2) + c[:, None, None] * M, linalg2.phi1(X), rtol=1e-12
    )
    E = rng.standard_normal((500, 2, 2))
    got = linalg2.phi1_frechet(X, E)
    for k in range(0, 500, 25):
        ref = _phi1_frechet_reference(X[k], E[k])
        np.testing.assert_allclose(got[k], ref, rtol=1e-7, atol=1e-9 * np.abs(ref).max())


def test_expm_parts_against_scipy():
    """f0 I + f1 M is scipy.linalg.expm (reference library) on every branch, and g is
    d f1 / d q (checked through the Frechet derivative against scipy's)."""
    rng = np.random.default_rng(5)
    X = rng.standard_normal((300, 2, 2)) * np.exp(rng.uniform(-6, 2.5, (300, 1, 1)))
    X = X[:, None] * np.linspace(0.0, 1.0, 7)[None, :, None, None]  # includes X = 0
    s, h, q, f0, f1, g = linalg2.expm_parts(X)
    M = X - s[..., None, None] * np.eye(2)
    F = f0[..., None, None] * np.eye(2) + f1[..., None, None] * M
    for k in range(0, 300, 10):
        for j in range(7):
            ref = scipy.linalg.expm(X[k, j])
            np.testing.assert_allclose(F[k, j], ref, rtol=1e-11, atol=1e-13 * np.abs(ref).max())
    # g through the unit direction E_12: L = (f1 x21 / 2) I + g x21 M + f1 E_12
    k, j = 17, 5
    E = np.array([[0.0, 1.0], [0.0, 0.0]])
    x21 = X[k, j, 1, 0]
    L = 0.5 * f1[k, j] * x21 * np.eye(2) + g[k, j] * x21 * M[k, j] + f1[k, j] * E
    ref = scipy.linalg.expm_frechet(X[k, j], E, compute_expm=False)
    np.testing.assert_allclose(L, ref, rtol=1e-9, atol=1e-12 * np.abs(ref).max())
