"""The estimator protocol, its result type and the batched least-squares core.

Most estimators are linear regressions in disguise: each turns a recording into a
*design* ``Y = Z C + intercepts + E`` and maps the coefficients ``C`` back to the
system ``dx/dt = A x + b``.  The solve is batched over a leading replicate axis, so
the point estimate is the one-replicate case of exactly the code the bootstrap runs:

* row-resampling schemes (moving blocks, cases) pass replicate *weights* ``w`` of
  shape ``(B, m)`` (the multiplicity of each row in the resample) with the original
  ``Z`` and ``Y``;
* the parametric scheme of the derivative and integral fits passes replicate
  designs ``Z`` of shape ``(B, m, p)`` and ``Y`` of shape ``(B, m, 2)``;
* the recursive schemes of the one-step fit accumulate each replicate's sums while
  regenerating its series and never form its design.

The solve is split in two: :func:`moments` forms the within-group-centred,
column-scaled normal equations of a design (:func:`moments_from_sums` forms the
same from sums), and :func:`solve_moments` solves them; :func:`lstsq` is the two in
a row.

Estimators that are not linear regressions (the output-error trajectory fit)
override :meth:`Estimator.fit` and :meth:`Estimator.fit_values`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from fitdyn import linalg2
from fitdyn.recording import Recording

__all__ = [
    "PARAMETERS",
    "Design",
    "Estimate",
    "SystemBatch",
    "Estimator",
    "NonlinearEstimator",
    "Moments",
    "moments",
    "moments_from_sums",
    "solve_moments",
    "lstsq",
    "equilibrium_from",
]

#: Names of the parameters whose covariance an Estimate may carry, in order.
PARAMETERS: tuple[str, ...] = ("a11", "a12", "a21", "a22", "b1", "b2")


@dataclass(frozen=True)
class Design:
    """Regression form ``Y = Z C + intercept[group] + E`` of one recording.

    Attributes
    ----------
    Z : ndarray, shape (m, p) or (B, m, p)
        Regressors.
    Y : ndarray, shape (m, 2) or (B, m, 2)
        Targets.
    groups : int ndarray, shape (m,), or None
        Intercept group of each row (one free intercept per group, estimated by
        centring within groups); ``None`` for no intercept.
    row_segment : int ndarray, shape (m,)
        Gap-free segment of each row (moving blocks never cross segments).
    row_trajectory : int ndarray, shape (m,)
        Trajectory of each row (case resampling draws whole trajectories).
    row_index : int ndarray, shape (m,)
        Index into the recording's samples that each row belongs to (the sample
        the row's target refers to).
    info : dict
        Whatever the estimator needs to map coefficients back (step, known
        equilibrium, column meaning...).
    """

    Z: np.ndarray
    Y: np.ndarray
    groups: np.ndarray | None
    row_segment: np.ndarray
    row_trajectory: np.ndarray
    row_index: np.ndarray
    info: dict[str, Any] = field(default_factory=dict)

    @property
    def n_rows(self) -> int:
        """Number of regression rows."""
        return int(self.Z.shape[-2])

    @property
    def n_coef(self) -> int:
        """Number of slope coefficients (intercepts not counted)."""
        return int(self.Z.shape[-1])

    @property
    def n_groups(self) -> int:
        """Number of intercept groups (0 without intercepts)."""
        return 0 if self.groups is None else int(self.groups.max()) + 1


@dataclass(frozen=True)
class SystemBatch:
    """A batch of fitted systems ``dx/dt = A x + b``.

    Attributes
    ----------
    matrix : ndarray, shape (B, 2, 2)
    offset : ndarray, shape (B, 2)
        ``b``; the equilibrium is ``-A^{-1} b`` where ``A`` is invertible.
    valid : bool ndarray, shape (B,)
        False where the estimator could not map the coefficients to a real system
        (e.g. no real logarithm of the one-step matrix).  Such replicates are kept
        and reported, never silently redrawn.
    """

    matrix: np.ndarray
    offset: np.ndarray
    valid: np.ndarray

    def equilibrium(self, rtol: float = 1e-9) -> np.ndarray:
        """Equilibria, NaN where ``A`` is (numerically) singular."""
        return equilibrium_from(self.matrix, self.offset, rtol)


def equilibrium_from(matrix: np.ndarray, offset: np.ndarray, rtol: float = 1e-9) -> np.ndarray:
    """``x* = -A^{-1} b``, NaN where ``|det A| <= rtol * ||A||_F^2``.

    Parameters
    ----------
    matrix : ndarray, shape (..., 2, 2)
    offset : ndarray, shape (..., 2)
    rtol : float
        Relative singularity threshold.

    Returns
    -------
    ndarray, shape (..., 2)
    """
    matrix = np.asarray(matrix, dtype=float)
    _, det, _ = linalg2.invariants(matrix)
    norm2 = np.sum(matrix * matrix, axis=(-2, -1))
    singular = np.abs(det) <= rtol * norm2
    with np.errstate(divide="ignore", invalid="ignore"):
        x = -linalg2.solve(matrix, offset)
    return np.where(singular[..., None], np.nan, x)


@dataclass(frozen=True)
class Moments:
    """Within-group-centred, column-scaled normal equations of a batch of regressions.

    The least-squares problem ``min sum_i w_i || Y_i - Z_i C - c_{g(i)} ||^2`` only
    needs these: with ``Zc``, ``Yc`` the rows centred by their (weighted) group means
    and ``s`` the column scales, ``zz = (Zc / s)' W (Zc / s)`` and ``zy = (Zc / s)' W
    Yc``.  :func:`moments` forms them from a design, :func:`moments_from_sums` from
    sums accumulated elsewhere (the recursive bootstrap accumulates them while it
    regenerates the series), and :func:`solve_moments` solves them.

    Attributes
    ----------
    zz : ndarray, shape (B, p, p)
        Scaled, centred ``Z' W Z``.
    zy : ndarray, shape (B, p, k)
        Scaled, centred ``Z' W Y``.
    scale : ndarray, shape (B, 1, p)
        Column scales ``s`` (root mean square of the centred columns; 1 for a zero
        column).
    zmean : ndarray, shape (B, G, p)
        Group means of ``Z`` (``G = 0`` without intercepts).
    ymean : ndarray, shape (B, G, k)
        Group means of ``Y``.
    """

    zz: np.ndarray
    zy: np.ndarray
    scale: np.ndarray
    zmean: np.ndarray
    ymean: np.ndarray


def moments(
    Z: np.ndarray,
    Y: np.ndarray,
    groups: np.ndarray | None = None,
    w: np.ndarray | None = None,
) -> Moments:
    """The normal equations of a (batched, weighted) design, centred and scaled.

    Columns are centred within groups and scaled before the products are formed,
    which keeps the equations well conditioned for data far from the origin.

    Parameters
    ----------
    Z : ndarray, shape (m, p) or (B, m, p)
    Y : ndarray, shape (m, k) or (B, m, k)
    groups : int ndarray, shape (m,), or None
        Intercept group of each row; ``None`` fits no intercept.
    w : ndarray, shape (m,) or (B, m), optional
        Non-negative row weights (resampling multiplicities).

    Returns
    -------
    Moments
        With the batch size ``B`` of the largest input (1 when nothing is batched).
    """
    Z = np.asarray(Z, dtype=float)
    Y = np.asarray(Y, dtype=float)
    if Z.ndim == 2:
        Z = Z[None]
    if Y.ndim == 2:
        Y = Y[None]
    m = Z.shape[-2]
    if w is None:
        W = np.ones((1, m))
    else:
        W = np.asarray(w, dtype=float)
        W = W[None] if W.ndim == 1 else W
    B = max(Z.shape[0], Y.shape[0], W.shape[0])
    p = Z.shape[-1]
    k = Y.shape[-1]

    weighted = w is not None
    if groups is not None:
        G = int(np.max(groups)) + 1
        if G == 1 and not weighted:
            zmean = Z.mean(axis=-2, keepdims=True)  # (B?, 1, p)
            ymean = Y.mean(axis=-2, keepdims=True)
        else:
            onehot = np.zeros((m, G))
            onehot[np.arange(m), groups] = 1.0
            WG = W[:, :, None] * onehot  # (B?, m, G): weights per group
            wsum = WG.sum(axis=-2)  # (B?, G)
            safe = np.where(wsum > 0, wsum, 1.0)[..., None]
            WGt = np.swapaxes(WG, -1, -2)  # (B?, G, m)
            zmean = (WGt @ Z) / safe
            ymean = (WGt @ Y) / safe
        Zc = Z - zmean[:, groups, :]
        Yc = Y - ymean[:, groups, :]
    else:
        G = 0
        Zc, Yc = Z, Y
        zmean = np.zeros((1, 0, p))
        ymean = np.zeros((1, 0, k))

    scale = np.sqrt(np.mean(Zc * Zc, axis=-2, keepdims=True))  # (B?, 1, p)
    scale = np.where(scale > 0, scale, 1.0)
    Zs = Zc / scale
    ZsT = np.swapaxes(Zs * W[..., None], -1, -2) if weighted else np.swapaxes(Zs, -1, -2)
    return Moments(
        zz=np.broadcast_to(ZsT @ Zs, (B, p, p)),
        zy=np.broadcast_to(ZsT @ Yc, (B, p, k)),
        scale=np.broadcast_to(scale, (B, 1, p)),
        zmean=np.broadcast_to(zmean, (B, G, p)),
        ymean=np.broadcast_to(ymean, (B, G, k)),
    )


def moments_from_sums(
    rows: np.ndarray | int,
    szz: np.ndarray,
    szy: np.ndarray,
    sz: np.ndarray | None = None,
    sy: np.ndarray | None = None,
    origin_z: np.ndarray | None = None,
    origin_y: np.ndarray | None = None,
) -> Moments:
    """The :class:`Moments` of unweighted rows given only their sums.

    The sums may be taken about any fixed origin (``z - origin_z``, ``y -
    origin_y``); an origin near the data (e.g. their mean) keeps the centring
    ``sum z z' - sum z sum z' / n`` free of cancellation.  Equal to
    :func:`moments` of the rows up to rounding.

    Parameters
    ----------
    rows : int or int ndarray, shape (G,)
        Number of rows (per intercept group when ``sz`` is given).
    szz : ndarray, shape (B, p, p)
        ``sum z z'`` over all rows.
    szy : ndarray, shape (B, p, k)
        ``sum z y'`` over all rows.
    sz : ndarray, shape (B, G, p), optional
        ``sum z`` per intercept group; ``None`` fits no intercept (the origins are
        then ignored: the sums must be about the origin of the regression).
    sy : ndarray, shape (B, G, k), optional
        ``sum y`` per intercept group.
    origin_z : ndarray, shape (p,), optional
        The point the ``z`` sums are taken about (default 0).
    origin_y : ndarray, shape (k,), optional
        The point the ``y`` sums are taken about (default 0).

    Returns
    -------
    Moments
    """
    szz = np.asarray(szz, dtype=float)
    szy = np.asarray(szy, dtype=float)
    B, p, k = szy.shape
    n = np.asarray(rows, dtype=float).reshape(-1)
    m = float(n.sum())
    if sz is None:
        zz, zy = szz, szy
        zmean = np.zeros((B, 0, p))
        ymean = np.zeros((B, 0, k))
    else:
        sz = np.asarray(sz, dtype=float)
        sy = np.asarray(sy, dtype=float)
        safe = np.where(n > 0, n, 1.0)[:, None]
        zbar = sz / safe  # (B, G, p), about the origin
        ybar = sy / safe
        zz = szz - np.swapaxes(sz, -1, -2) @ zbar
        zy = szy - np.swapaxes(sz, -1, -2) @ ybar
        zmean = zbar + (0.0 if origin_z is None else np.asarray(origin_z, dtype=float))
        ymean = ybar + (0.0 if origin_y is None else np.asarray(origin_y, dtype=float))
    d = np.diagonal(zz, axis1=-2, axis2=-1)  # (B, p)
    scale = np.sqrt(np.clip(d, 0.0, None) / max(m, 1.0))
    scale = np.where(scale > 0, scale, 1.0)[:, None, :]  # (B, 1, p)
    st = np.swapaxes(scale, -1, -2)  # (B, p, 1)
    return Moments(zz=zz / (st * scale), zy=zy / st, scale=scale, zmean=zmean, ymean=ymean)


def solve_moments(mom: Moments) -> tuple[np.ndarray, np.ndarray]:
    """Slopes and intercepts from batched normal equations.

    Parameters
    ----------
    mom : Moments

    Returns
    -------
    C : ndarray, shape (B, p, k)
        Slope coefficients; NaN for a replicate whose equations are singular.
    c : ndarray, shape (B, G, k)
        Intercepts per group (``G = 0`` without groups).
    """
    ZtZ, ZtY = mom.zz, mom.zy
    B, p, k = ZtY.shape
    # a rank-deficient replicate (e.g. a resample of one repeated row) yields NaN
    # rather than an exception, and is flagged invalid downstream
    ok = np.linalg.cond(ZtZ) < 1e14
    Cs = np.full((B, p, k), np.nan)
    if ok.any():
        Cs[ok] = np.linalg.solve(ZtZ[ok], ZtY[ok])
    C = Cs / np.swapaxes(mom.scale, -1, -2)
    if mom.zmean.shape[-2]:
        c = mom.ymean - mom.zmean @ C
    else:
        c = np.zeros((B, 0, k))
    return C, c


def lstsq(
    Z: np.ndarray,
    Y: np.ndarray,
    groups: np.ndarray | None = None,
    w: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Batched (weighted) least squares with optional per-group intercepts.

    Solves ``min sum_i w_i || Y_i - Z_i C - c_{g(i)} ||^2`` for every replicate:
    :func:`solve_moments` of :func:`moments`.

    Parameters
    ----------
    Z : ndarray, shape (m, p) or (B, m, p)
    Y : ndarray, shape (m, k) or (B, m, k)
    groups : int ndarray, shape (m,), or None
        Intercept group of each row; ``None`` fits no intercept.
    w : ndarray, shape (m,) or (B, m), optional
        Non-negative row weights (resampling multiplicities).

    Returns
    -------
    C : ndarray, shape (B, p, k)
        Slope coefficients (``B = 1`` when nothing is batched).
    c : ndarray, shape (B, G, k)
        Intercepts per group (``G = 0`` without groups).
    """
    return solve_moments(moments(Z, Y, groups, w))


@dataclass(frozen=True)
class Estimate:
    """What an estimator returns for one recording.

    Attributes
    ----------
    method : str
        Estimator name.
    matrix : ndarray, shape (2, 2)
        The system matrix ``A``.
    offset : ndarray, shape (2,)
        ``b`` in ``dx/dt = A x + b``.
    equilibrium : ndarray, shape (2,), or None
        ``x* = -A^{-1} b``; ``None`` where ``A`` is singular (no unique equilibrium).
    equilibrium_known : bool
        Whether the equilibrium was given by the user rather than estimated.
    residuals : ndarray, shape (m, 2)
        The estimator's own residuals (in its own regression form).
    residual_cov : ndarray, shape (2, 2)
        Their covariance (degrees of freedom corrected).
    n_used : int
        Number of regression rows (or samples) used.
    settings : dict
        The method's own settings, as used.
    param_cov : ndarray, shape (6, 6), or None
        Asymptotic covariance of ``(a11, a12, a21, a22, b1, b2)`` (see
        :data:`PARAMETERS`), where the estimator provides one.
    notes : tuple of str
        Facts about the fit (e.g. why ``auto`` chose this method).
    warnings : tuple of str
        Things the user must know (aliasing risk, weak identifiability...).
    extra : dict
        Estimator-specific results (e.g. the one-step matrix of the discrete fit,
        fitted initial states of the trajectory fit).
    """

    method: str
    matrix: np.ndarray
    offset: np.ndarray
    equilibrium: np.ndarray | None
    equilibrium_known: bool
    residuals: np.ndarray
    residual_cov: np.ndarray
    n_used: int
    settings: dict[str, Any]
    param_cov: np.ndarray | None = None
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description."""
        eq = None if self.equilibrium is None else [float(v) for v in self.equilibrium]
        return {
            "method": self.method,
            "matrix": np.asarray(self.matrix, dtype=float).tolist(),
            "offset": np.asarray(self.offset, dtype=float).tolist(),
            "equilibrium": eq,
            "equilibrium_known": self.equilibrium_known,
            "residual_cov": np.asarray(self.residual_cov, dtype=float).tolist(),
            "n_used": int(self.n_used),
            "settings": _jsonable(self.settings),
            "notes": list(self.notes),
            "warnings": list(self.warnings),
        }


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


class Estimator(ABC):
    """Base class of every estimator.

    Subclasses set :attr:`name`, accept their settings as keyword arguments in
    ``__init__`` (stored in :attr:`settings`) and implement :meth:`design` and
    :meth:`to_system`; the base class then provides :meth:`fit` (the point
    estimate) and :meth:`fit_design` (the batched solve the bootstrap calls).

    Parameters
    ----------
    **settings
        Method-specific settings.
    """

    name: ClassVar[str] = "base"
    #: whether the estimator needs a uniform time step
    needs_uniform_steps: ClassVar[bool] = False
    #: whether the estimator is a linear regression (design / to_system)
    is_regression: ClassVar[bool] = True

    def __init__(self, **settings: Any) -> None:
        self.settings: dict[str, Any] = dict(settings)

    # -- the regression form ----------------------------------------------------
    @abstractmethod
    def design(
        self,
        rec: Recording,
        equilibrium: np.ndarray | None = None,
        values: np.ndarray | None = None,
    ) -> Design:
        """Regression form of a recording.

        Parameters
        ----------
        rec : Recording
        equilibrium : ndarray, shape (2,), optional
            A known equilibrium (no intercept is then fitted for the offset).
        values : ndarray, shape (B, n, 2), optional
            Replicate channel values on ``rec``'s sampling (parametric bootstrap);
            the design then carries a leading batch axis.
        """

    @abstractmethod
    def to_system(self, C: np.ndarray, c: np.ndarray, design: Design) -> SystemBatch:
        """Map batched coefficients ``C`` (B, p, 2) and intercepts ``c`` (B, G, 2)."""

    def solve(self, design: Design, w: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Batched coefficients ``C`` (B, p, 2) and intercepts ``c`` (B, G, 2).

        Ordinary (weighted) least squares by default; estimators with another
        linear solve (instrumental variables) override it.
        """
        return lstsq(design.Z, design.Y, design.groups, w)

    def fit_design(self, design: Design, w: np.ndarray | None = None) -> SystemBatch:
        """Batched solve: the coefficients for every replicate, mapped to systems."""
        C, c = self.solve(design, w)
        return self.to_system(C, c, design)

    def fit_values(
        self, rec: Recording, values: np.ndarray, equilibrium: np.ndarray | None = None
    ) -> SystemBatch:
        """Refit on replicate values (B, n, 2) sharing ``rec``'s sampling."""
        return self.fit_design(self.design(rec, equilibrium, values))

    # -- the point estimate -------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Point estimate: the one-replicate case of :meth:`fit_design`."""
        d = self.design(rec, equilibrium)
        C, c = self.solve(d)
        sysb = self.to_system(C, c, d)
        return self.make_estimate(rec, d, C[0], c[0], sysb, equilibrium)

    def make_estimate(
        self,
        rec: Recording,
        d: Design,
        C: np.ndarray,
        c: np.ndarray,
        sysb: SystemBatch,
        equilibrium: np.ndarray | None,
    ) -> Estimate:
        """Assemble the :class:`Estimate` (residuals, covariance, warnings)."""
        resid = d.Y - d.Z @ C
        if d.groups is not None:
            resid = resid - c[d.groups]
        dof = max(d.n_rows - d.n_coef - d.n_groups, 1)
        rcov = resid.T @ resid / dof
        A = sysb.matrix[0]
        b = sysb.offset[0]
        eq = (
            np.asarray(equilibrium, dtype=float)
            if equilibrium is not None
            else sysb.equilibrium()[0]
        )
        eq_out = None if np.any(np.isnan(eq)) else eq
        return Estimate(
            method=self.name,
            matrix=A,
            offset=b,
            equilibrium=eq_out,
            equilibrium_known=equilibrium is not None,
            residuals=resid,
            residual_cov=rcov,
            n_used=d.n_rows,
            settings=dict(self.settings),
            param_cov=self.parameter_covariance(d, C, c, rcov, sysb),
            notes=tuple(self.notes(rec, d, sysb)),
            warnings=tuple(self.warnings(rec, d, sysb)),
            extra=self.extra(rec, d, C, c, sysb),
        )

    # -- hooks subclasses may override ----------------------------------------------
    def parameter_covariance(
        self, d: Design, C: np.ndarray, c: np.ndarray, rcov: np.ndarray, sysb: SystemBatch
    ) -> np.ndarray | None:
        """Asymptotic covariance of (a11, a12, a21, a22, b1, b2), or None."""
        return None

    def notes(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        """Facts worth recording about this fit."""
        return []

    def warnings(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        """Warnings about this fit."""
        return []

    def extra(
        self, rec: Recording, d: Design, C: np.ndarray, c: np.ndarray, sysb: SystemBatch
    ) -> dict[str, Any]:
        """Estimator-specific results."""
        return {}


class NonlinearEstimator(Estimator):
    """Base class of the estimators that are not linear regressions.

    They override :meth:`~Estimator.fit` and :meth:`~Estimator.fit_values` (one
    batched refit of all replicates); the regression form does not exist, so
    :meth:`design` and :meth:`to_system` refuse, and the bootstrap resamples them by
    refitting replicate values (parametric or case schemes), never by row weights.
    """

    is_regression: ClassVar[bool] = False

    def design(
        self,
        rec: Recording,
        equilibrium: np.ndarray | None = None,
        values: np.ndarray | None = None,
    ) -> Design:
        """Not available: the fit is not a linear regression.

        Raises
        ------
        EstimationError
            Always; resample this estimator with :meth:`fit_values`.
        """
        from fitdyn.errors import EstimationError

        raise EstimationError(
            f"method '{self.name}' is not a linear regression and has no design; "
            "resample it by refitting replicate values (fit_values)"
        )

    def to_system(self, C: np.ndarray, c: np.ndarray, design: Design) -> SystemBatch:
        """Not available (see :meth:`design`)."""
        from fitdyn.errors import EstimationError

        raise EstimationError(
            f"method '{self.name}' is not a linear regression; it has no coefficients to map"
        )
