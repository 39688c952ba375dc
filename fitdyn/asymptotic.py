"""Fast asymptotic uncertainty from an estimator's covariance (the delta method).

The estimator's covariance ``param_cov`` of ``theta = (a11, a12, a21, a22, b1, b2)``
(:data:`fitdyn.estimators.base.PARAMETERS`) is carried to every summarised
statistic ``s(theta)`` by the delta method: ``Var s = g^T Sigma g`` with the
gradient ``g`` by central differences (all perturbations in one batch), and the
interval is ``s(theta_hat) +- z sd``.  Class probabilities, ``P(stable)``, the
star test of ``consistent_with`` and the cloud for plots come from draws of the
normal approximation ``N(theta_hat, Sigma)`` -- a Monte Carlo version of the same
approximation (sometimes called the Krinsky-Robb method, from memory).

The approximation is first order: it is good for long records away from class
boundaries and poor near repeated eigenvalues (where eigenvalues are not
differentiable functions of ``A``) and for short, persistent records whose
estimates are biased.  It is a fast check, not a replacement for the bootstrap.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from fitdyn.bootstrap import Uncertainty, replicate_statistics, summarize
from fitdyn.errors import EstimationError
from fitdyn.estimators.base import Estimate, Estimator
from fitdyn.recording import Recording

__all__ = ["asymptotic", "delta_intervals"]

#: Label of the scheme in the results.
SCHEME = "asymptotic (delta method)"

_NAMES = (
    "trace",
    "determinant",
    "discriminant",
    "max_real_part",
    "eigenvalue_real",
    "eigenvalue_imag",
    "matrix",
    "offset",
    "equilibrium",
    "period",
    "damping_ratio",
)


def _stat_table(theta: np.ndarray) -> tuple[np.ndarray, list[tuple[str, tuple[int, ...]]]]:
    """Flatten the statistics of systems ``theta`` (n, 6) into (n, k) and a layout."""
    A = theta[:, :4].reshape(-1, 2, 2)
    b = theta[:, 4:6]
    st = replicate_statistics(A, b)
    cols, layout = [], []
    for name in _NAMES:
        x = np.asarray(st[name], dtype=float)
        layout.append((name, x.shape[1:]))
        cols.append(x.reshape(x.shape[0], -1))
    return np.concatenate(cols, axis=1), layout


def delta_intervals(
    theta: np.ndarray, cov: np.ndarray, confidence: float = 0.95
) -> dict[str, np.ndarray]:
    """Delta-method intervals of every summarised statistic.

    Parameters
    ----------
    theta : ndarray, shape (6,)
        ``(a11, a12, a21, a22, b1, b2)``.
    cov : ndarray, shape (6, 6)
        Its covariance.
    confidence : float

    Returns
    -------
    dict
        Name -> array of shape ``statistic shape + (2,)``; NaN where the statistic is
        undefined at ``theta`` (e.g. the period of a node).
    """
    from scipy.special import ndtri

    theta = np.asarray(theta, dtype=float)
    cov = np.asarray(cov, dtype=float)
    z = float(ndtri(0.5 + confidence / 2))
    scale = max(float(np.max(np.abs(theta))), 1e-300)
    eps = 1e-6 * np.maximum(np.abs(theta), 1e-3 * scale)
    pert = np.concatenate([theta[None], theta + np.diag(eps), theta - np.diag(eps)])
    vals, layout = _stat_table(pert)
    centre = vals[0]
    G = (vals[1:7] - vals[7:13]) / (2.0 * eps[:, None])  # (6, k)
    var = np.einsum("ik,ij,jk->k", G, cov, G)
    sd = np.sqrt(np.clip(var, 0.0, None))
    lo, hi = centre - z * sd, centre + z * sd
    out: dict[str, np.ndarray] = {}
    j = 0
    for name, shape in layout:
        k = int(np.prod(shape)) if shape else 1
        iv = np.stack([lo[j : j + k], hi[j : j + k]], axis=-1)
        out[name] = iv.reshape(shape + (2,)) if shape else iv[0]
        j += k
    return out


def asymptotic(
    rec: Recording,
    estimator: Estimator,
    estimate: Estimate,
    confidence: float = 0.95,
    draws: int = 4000,
    seed: Any = None,
    margin: float | None = None,
) -> Uncertainty:
    """Uncertainty from the estimator's asymptotic covariance.

    Intervals: the delta method (symmetric normal intervals from numerical
    gradients).  Probabilities, the star test and the cloud: ``draws`` samples of
    ``N(theta_hat, param_cov)``.  The result's scheme is
    ``"asymptotic (delta method)"`` and its method ``"delta"``.

    Parameters
    ----------
    rec : Recording
        The recording (kept for a uniform signature with :func:`fitdyn.bootstrap.bootstrap`).
    estimator : Estimator
        The estimator used (its name labels failures).
    estimate : Estimate
        Must carry ``param_cov``.
    confidence : float
        Confidence level (default 0.95).
    draws : int
        Draws of the normal approximation (default 4000).
    seed : int, Generator or None
        Seed of the draws.
    margin : float, optional
        Practical-equivalence margin (see :func:`fitdyn.bootstrap.margin_codes`).

    Returns
    -------
    Uncertainty

    Raises
    ------
    EstimationError
        When the estimate has no usable covariance.
    """
    cov = estimate.param_cov
    if cov is None:
        raise EstimationError(
            f"the '{estimator.name}' fit provides no asymptotic covariance; use the "
            "bootstrap (fit with bootstrap=B) instead"
        )
    cov = np.asarray(cov, dtype=float)
    if cov.shape != (6, 6) or not np.all(np.isfinite(cov)):
        raise EstimationError(
            f"the '{estimator.name}' fit's covariance is not a finite 6x6 matrix; "
            "use the bootstrap instead"
        )
    cov = 0.5 * (cov + cov.T)
    draws = int(draws)
    if draws < 2:
        raise EstimationError(f"draws must be at least 2, got {draws!r}")
    theta = np.concatenate(
        [np.asarray(estimate.matrix, dtype=float).reshape(4), np.asarray(estimate.offset, float)]
    )
    w, V = np.linalg.eigh(cov)
    notes = [
        "intervals by the delta method from the estimator's covariance; probabilities "
        f"from {draws} draws of the normal approximation"
    ]
    warns = []
    if np.min(w) < -1e-10 * max(float(np.max(np.abs(w))), 1e-300):
        warns.append("the estimator's covariance is not positive semi-definite; clipped")
    root = V * np.sqrt(np.clip(w, 0.0, None))[None, :]
    rng = np.random.default_rng(seed)
    th = theta + rng.standard_normal((draws, 6)) @ root.T
    ivs = delta_intervals(theta, cov, confidence)
    return summarize(
        th[:, :4].reshape(-1, 2, 2),
        th[:, 4:6],
        np.ones(draws, dtype=bool),
        np.asarray(estimate.matrix, dtype=float),
        np.asarray(estimate.offset, dtype=float),
        confidence=confidence,
        method="delta",
        margin=margin,
        scheme=SCHEME,
        seed=seed,
        failure_label="failed fit",
        warnings=tuple(warns),
        notes=tuple(notes),
        delta_intervals=ivs,
    )
