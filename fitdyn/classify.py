"""Type and stability of the equilibrium of a 2x2 linear system.

The class follows from the trace ``tau``, the determinant ``det`` and the
discriminant ``disc = tau^2 - 4 det`` (the trace-determinant plane; Strogatz,
*Nonlinear Dynamics and Chaos*, 2nd ed., 2015, sec. 5.2; Hirsch, Smale & Devaney,
*Differential Equations, Dynamical Systems, and an Introduction to Chaos*).

Tolerance
---------
The boundary classes (center, star, degenerate node, non-isolated equilibria) are
sets of measure zero: estimated matrices never land on them exactly.  So that exact
or noise-free data still do, the point-estimate label uses a relative tolerance
``rtol`` on quantities made dimensionless by the eigenvalue scale
``rho = max |lambda|`` (the Frobenius norm of ``A`` when ``rho = 0``):

* non-isolated equilibria when ``|det| <= rtol * rho^2``;
* center when ``|tau| <= rtol * rho`` and ``det > 0``;
* repeated eigenvalues when ``|disc| <= rtol * rho^2`` -- i.e. the eigenvalues are
  closer than ``sqrt(rtol) * rho``, which is how far a perturbation of size
  ``rtol`` can move a defective pair apart; then a star when
  ``||A - (tau / 2) I||_F <= sqrt(rtol) * rho``, otherwise a degenerate node.

The default ``rtol = 1e-6``.  ``rtol = 0`` gives the generic classes only (up to
exact ties), which is what bootstrap replicates use.

Consequences worth knowing.  Apart from star versus degenerate node, the tests
depend on the eigenvalues only, so the label does not change when either channel is
rescaled (a change of units, ``D A D^-1`` with ``D`` diagonal), when time is
rescaled (``c A``, ``c > 0``) or under any other change of coordinates; a test on
the entries (a distance to the boundary in the Frobenius norm, say) would lose
this.  The price is the square root above: a diagonalisable matrix whose
eigenvalues are closer than ``sqrt(rtol) * rho`` (0.1 % with the default) counts as
a star or degenerate node, though a perturbation of only about that size separates
it from one.  And a perturbed nilpotent matrix (``[[0, 1], [-e, 0]]``) has
eigenvalues ``~ sqrt(e)`` that are not small compared with ``rho`` itself, so it
is a center or saddle rather than non-isolated equilibria; only the exactly
singular case lands there.
"""

from __future__ import annotations

import numpy as np

from fitdyn import linalg2

__all__ = [
    "LABELS",
    "GENERIC",
    "BOUNDARY",
    "STABILITY",
    "DEFAULT_RTOL",
    "classify_codes",
    "classify",
    "stability_of",
    "is_stable_label",
]

DEFAULT_RTOL = 1e-6

#: Every label, in code order.
LABELS: tuple[str, ...] = (
    "saddle",
    "stable node",
    "unstable node",
    "stable spiral",
    "unstable spiral",
    "center",
    "stable star",
    "unstable star",
    "stable degenerate node",
    "unstable degenerate node",
    "non-isolated equilibria",
)

#: Classes of positive probability (open regions of the trace-determinant plane).
GENERIC: tuple[str, ...] = LABELS[:5]

#: Boundary classes (measure-zero sets).
BOUNDARY: tuple[str, ...] = LABELS[5:]

#: Stability verdicts, in code order.
STABILITY: tuple[str, ...] = (
    "asymptotically stable",
    "stable (not asymptotically)",
    "unstable",
)

_ASYM, _STABLE, _UNSTABLE = 0, 1, 2


def classify_codes(A: np.ndarray, rtol: float = DEFAULT_RTOL) -> tuple[np.ndarray, np.ndarray]:
    """Class and stability codes for a batch of 2x2 matrices.

    Parameters
    ----------
    A : ndarray, shape (..., 2, 2)
    rtol : float
        Relative tolerance for the boundary classes (see module notes).

    Returns
    -------
    label : int ndarray, shape (...)
        Index into :data:`LABELS`.
    stability : int ndarray, shape (...)
        Index into :data:`STABILITY`.

    Raises
    ------
    ValueError
        If any matrix has a NaN or infinite entry (it has no class; labelling it
        would hide a failed estimate).
    """
    A = np.asarray(A, dtype=float)
    tau, det, disc = linalg2.invariants(A)
    finite = np.isfinite(A).all(axis=(-2, -1))
    if not np.all(finite):
        bad = int(np.size(finite) - np.count_nonzero(finite))
        raise ValueError(
            f"cannot classify {bad} of {np.size(finite)} matrices: they contain NaN or "
            "infinite entries; remove them, and count them, before classifying"
        )
    lam = linalg2.eigvals(A)
    rho = np.max(np.abs(lam), axis=-1)
    fro = np.sqrt(np.sum(A * A, axis=(-2, -1)))
    scale = np.where(rho > 0, rho, fro)
    dev = A - 0.5 * tau[..., None, None] * np.eye(2)
    dev_norm = np.sqrt(np.sum(dev * dev, axis=(-2, -1)))

    zero = scale == 0
    flat = (np.abs(det) <= rtol * scale**2) | zero
    centre = ~flat & (np.abs(tau) <= rtol * scale) & (det > 0)
    repeated = ~flat & ~centre & (det > 0) & (np.abs(disc) <= rtol * scale**2)
    star = repeated & (dev_norm <= np.sqrt(rtol) * scale)
    degenerate = repeated & ~star
    generic = ~flat & ~centre & ~repeated
    neg = tau < 0

    label = np.select(
        [
            flat,
            centre,
            star & neg,
            star & ~neg,
            degenerate & neg,
            degenerate & ~neg,
            generic & (det < 0),
            generic & (disc >= 0) & neg,
            generic & (disc >= 0) & ~neg,
            generic & (disc < 0) & neg,
        ],
        [10, 5, 6, 7, 8, 9, 0, 1, 2, 3],
        default=4,
    )

    # stability
    # non-isolated equilibria: governed by the other eigenvalue (= trace); with a
    # zero trace too, A is zero (every point fixed: stable) or nilpotent (unstable)
    other_neg = tau < -rtol * scale
    other_zero = np.abs(tau) <= rtol * scale
    flat_stab = np.where(
        other_neg | zero | (other_zero & (fro <= rtol * np.maximum(scale, 1e-300))),
        _STABLE,
        _UNSTABLE,
    )
    stab = np.select(
        [flat, centre, label == 0, neg],
        [flat_stab, _STABLE, _UNSTABLE, _ASYM],
        default=_UNSTABLE,
    )
    return label.astype(np.int8), stab.astype(np.int8)


def classify(A: np.ndarray, rtol: float = DEFAULT_RTOL):
    """Class label and stability verdict of 2x2 matrices.

    Parameters
    ----------
    A : ndarray, shape (2, 2) or (..., 2, 2)
    rtol : float
        Relative tolerance for the boundary classes (see module notes).

    Returns
    -------
    label, stability : str, or object ndarrays of str for a batch

    Examples
    --------
    >>> classify([[1.0, 1.0], [4.0, -2.0]])
    ('saddle', 'unstable')
    """
    codes, stab = classify_codes(np.asarray(A, dtype=float), rtol)
    labels = np.asarray(LABELS, dtype=object)[codes]
    verdicts = np.asarray(STABILITY, dtype=object)[stab]
    if np.ndim(codes) == 0:
        return str(labels), str(verdicts)
    return labels, verdicts


def stability_of(label: str) -> str | None:
    """Stability implied by a label alone (``None`` for non-isolated equilibria)."""
    if label in ("saddle",) or label.startswith("unstable"):
        return STABILITY[_UNSTABLE]
    if label == "center":
        return STABILITY[_STABLE]
    if label.startswith("stable"):
        return STABILITY[_ASYM]
    return None


def is_stable_label(label: str) -> bool:
    """Whether a label is asymptotically stable."""
    return stability_of(label) == STABILITY[_ASYM]
