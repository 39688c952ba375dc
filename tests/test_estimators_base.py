"""Tests of the batched least-squares core: normal equations from a design or from sums.

External reference: numpy.linalg.lstsq (least squares with explicit group dummies,
weights as square-root-scaled rows).
"""

from __future__ import annotations

import numpy as np
import pytest

from fitdyn.estimators.base import lstsq, moments, moments_from_sums, solve_moments


def _problem(B=3, m=40, G=2, seed=0, far=1e4):
    rng = np.random.default_rng(seed)
    Z = far + rng.standard_normal((B, m, 2)) * [1.0, 3.0]  # far from the origin
    C = np.array([[0.9, 0.2], [-0.1, 0.7]])
    groups = np.arange(m) % G if G else None
    Y = Z @ C + rng.standard_normal((B, m, 2))
    if G:
        Y = Y + np.array([[1.0, -2.0], [3.0, 0.5]])[:G][groups]
    return Z, Y, groups


def _reference(Z, Y, groups, w=None):
    """numpy.linalg.lstsq with one dummy column per group, one replicate at a time."""
    out = []
    for i in range(Z.shape[0]):
        X = Z[i] if groups is None else np.column_stack([Z[i], np.eye(groups.max() + 1)[groups]])
        sw = np.ones(Z.shape[1]) if w is None else np.sqrt(w[i])
        out.append(np.linalg.lstsq(X * sw[:, None], Y[i] * sw[:, None], rcond=None)[0])
    return np.array(out)


@pytest.mark.parametrize("G", [0, 1, 2])
@pytest.mark.parametrize("weighted", [False, True])
def test_lstsq_matches_numpy_lstsq(G, weighted):
    # far from the origin only with an intercept (without one the normal equations of
    # such data are ill conditioned for any method)
    Z, Y, groups = _problem(G=G, far=1e4 if G else 0.0)
    w = (
        np.random.default_rng(1).integers(0, 3, size=Z.shape[:2]).astype(float)
        if weighted
        else None
    )
    C, c = lstsq(Z, Y, groups, w)
    ref = _reference(Z, Y, groups, w)
    np.testing.assert_allclose(C, ref[:, :2], rtol=1e-8, atol=1e-9)
    assert c.shape == (3, G, 2)
    if G:
        np.testing.assert_allclose(c, ref[:, 2:], rtol=1e-8, atol=1e-6)


@pytest.mark.parametrize("G", [0, 2])
def test_moments_from_sums_equal_moments_of_the_rows(G):
    Z, Y, groups = _problem(G=G, far=5.0)
    direct = moments(Z, Y, groups)
    origin = np.array([4.0, 6.0]) if G else np.zeros(2)  # sums about a point near the data
    z, y = Z - origin, Y - origin
    szz = np.swapaxes(z, -1, -2) @ z
    szy = np.swapaxes(z, -1, -2) @ y
    if G:
        onehot = np.eye(G)[groups].T  # (G, m)
        rows = onehot.sum(axis=1)
        summed = moments_from_sums(rows, szz, szy, onehot @ z, onehot @ y, origin, origin)
    else:
        summed = moments_from_sums(Z.shape[1], szz, szy)
    for name in ("zz", "zy", "scale", "zmean", "ymean"):
        np.testing.assert_allclose(
            getattr(summed, name), getattr(direct, name), rtol=1e-10, atol=1e-12, err_msg=name
        )
    C1, c1 = solve_moments(summed)
    C2, c2 = lstsq(Z, Y, groups)
    np.testing.assert_allclose(C1, C2, rtol=1e-10)
    np.testing.assert_allclose(c1, c2, rtol=1e-10, atol=1e-12)


def test_singular_replicate_gives_nan_not_an_exception():
    Z, Y, groups = _problem(B=2, G=1)
    Z = Z.copy()
    Z[1, :, 1] = 2.0 * Z[1, :, 0]  # collinear columns in replicate 1
    C, c = lstsq(Z, Y, groups)
    assert np.all(np.isfinite(C[0])) and np.all(np.isnan(C[1]))
