"""Discrete-time fit: one-step least squares, then the principal matrix logarithm.

Consecutive samples ``x_k``, ``x_{k+1}`` of one gap-free segment, a uniform step
``h`` apart, obey exactly (for the linear model, without noise)

    x_{k+1} = F x_k + g,      F = expm(A h),      g = (integral_0^h expm(A s) ds) b,

so least squares of ``x_{k+1}`` on ``[x_k, 1]`` -- a VAR(1) with a constant
(Luetkepohl, *New Introduction to Multiple Time Series Analysis*, 2005, ch. 3) --
gives ``F`` and ``g``, and

    A = log(F) / h   (principal branch),      b = (integral_0^h expm(A s) ds)^{-1} g.

The second formula holds even when ``A`` is singular (a line of equilibria); where
``A`` is invertible the equilibrium is ``x* = -A^{-1} b = (I - F)^{-1} g``.  A real
principal logarithm exists iff ``F`` has no eigenvalue on the closed negative real
axis (Higham, *Functions of Matrices*, 2008, thm 1.31); otherwise the point fit
refuses and bootstrap replicates are flagged invalid.  The principal branch assumes
``|Im lambda| h < pi`` (Nyquist); the fit warns from ``pi / 2`` on.

With a known equilibrium the regression is ``x_{k+1} - x* = F (x_k - x*)`` without
a constant and ``b = -A x*``.

OLS autoregressions are biased in short samples (Nicholls & Pope 1988, from
memory); :func:`bias_correction` provides the bootstrap-after-bootstrap correction of
Kilian (Rev. Econ. Stat. 80, 1998) that :mod:`fitdyn.bootstrap` uses.
"""

from __future__ import annotations

from typing import Any, ClassVar, NamedTuple

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import (
    EstimationError,
    NoRealLogarithmError,
    SamplingError,
    TooFewSamplesError,
)
from fitdyn.estimators.base import Design, Estimate, Estimator, SystemBatch
from fitdyn.recording import Recording

__all__ = [
    "DiscreteEstimator",
    "one_step_pairs",
    "system_from_one_step",
    "bias_correction",
    "BiasCorrection",
    "ALIASING_LIMIT",
]

#: ``|Im lambda| h`` above which the fit warns of aliasing (the hard limit is pi).
ALIASING_LIMIT = np.pi / 2

_ALTERNATIVES = "use the 'integral', 'derivative' or 'trajectory' estimator instead"


def one_step_pairs(rec: Recording, jitter_tolerance: float = 0.01) -> tuple[np.ndarray, float]:
    """Indices ``k`` of the samples that have a successor in the same segment.

    Parameters
    ----------
    rec : Recording
    jitter_tolerance : float
        Largest relative deviation of a within-segment step from the median step.

    Returns
    -------
    first : int ndarray, shape (m,)
        Sample index of ``x_k`` for each pair (``x_{k+1}`` is ``first + 1``).
    step : float
        The median step ``h``.

    Raises
    ------
    SamplingError
        When the steps are not uniform within ``jitter_tolerance``.
    TooFewSamplesError
        When fewer than four pairs remain.
    """
    seg = np.asarray(rec.segment)
    same = seg[1:] == seg[:-1]
    first = np.flatnonzero(same)
    need = 4
    if first.size < need:
        raise TooFewSamplesError(
            f"the discrete estimator needs at least {need} pairs of consecutive samples "
            f"within a gap-free segment, found {first.size}; record more samples",
            source=rec.source,
        )
    steps = rec.times[first + 1] - rec.times[first]
    h = float(np.median(steps))
    if not h > 0:
        raise SamplingError(
            f"the median step is {h!r}, not positive; check the time column",
            source=rec.source,
        )
    dev = np.abs(steps - h) / h
    worst = int(np.argmax(dev))
    if dev[worst] > jitter_tolerance:
        k = int(first[worst])
        ratio = steps / h
        on_grid = bool(np.all(np.abs(ratio - np.round(ratio)) <= jitter_tolerance * ratio))
        hint = (
            "; the steps are whole multiples of the median step (missing samples): read "
            "the file with gap_factor=1.5 (--gap-factor 1.5) to treat each hole as a gap"
            if on_grid
            else ""
        )
        raise SamplingError(
            f"the discrete estimator needs a uniform step, but the step after time "
            f"{float(rec.times[k]):.6g} is {float(steps[worst]):.6g} against a median of "
            f"{h:.6g} ({100 * dev[worst]:.3g} % off, tolerance "
            f"{100 * jitter_tolerance:.3g} %){hint}; {_ALTERNATIVES}",
            source=rec.source,
            row=int(rec.source_rows[k + 1]),
        )
    return first, h


def system_from_one_step(
    F: np.ndarray, g: np.ndarray | None, step: float, equilibrium: np.ndarray | None = None
) -> SystemBatch:
    """Map one-step coefficients to continuous-time systems (batched).

    Parameters
    ----------
    F : ndarray, shape (B, 2, 2)
        One-step matrices.
    g : ndarray, shape (B, 2), or None
        One-step constants (ignored when ``equilibrium`` is given).
    step : float
        The step ``h``.
    equilibrium : ndarray, shape (2,), optional
        A known equilibrium: then ``b = -A x*``.

    Returns
    -------
    SystemBatch
        ``A = log(F) / h`` and ``b``; ``valid`` is False (and ``A``, ``b`` NaN) where
        ``F`` has no real principal logarithm or is not finite.
    """
    F = np.asarray(F, dtype=float)
    L, ok = linalg2.logm(F)
    A = L / step
    if equilibrium is not None:
        b = -np.einsum("bij,j->bi", A, np.asarray(equilibrium, dtype=float))
    else:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            b = linalg2.solve(linalg2.expm_integral(np.where(ok[:, None, None], A, 0.0), step), g)
    valid = ok & np.all(np.isfinite(A), axis=(-2, -1)) & np.all(np.isfinite(b), axis=-1)
    A = np.where(valid[:, None, None], A, np.nan)
    b = np.where(valid[:, None], b, np.nan)
    return SystemBatch(matrix=A, offset=b, valid=valid)


def _eig_text(mu: np.ndarray) -> str:
    parts = []
    for z in mu:
        parts.append(f"{z.real:.4g}" if abs(z.imag) == 0 else f"{z.real:.4g}{z.imag:+.4g}i")
    return ", ".join(parts)


class DiscreteEstimator(Estimator):
    """One-step least squares ``x_{k+1} = F x_k + g`` and ``A = log(F) / h``.

    Parameters
    ----------
    jitter_tolerance : float, default 0.01
        Largest relative deviation of a step from the median step (1 %); beyond it
        the fit refuses with :class:`~fitdyn.errors.SamplingError`.

    Notes
    -----
    ``extra`` of the estimate holds ``one_step_matrix`` (F), ``one_step_constant``
    (g; zero with a known equilibrium), ``step`` (h) and ``one_step_covariance``: the
    OLS covariance of ``(F11, F12, F21, F22, g1, g2)`` (``Sigma_u`` Kronecker
    ``(X'X)^{-1}``, as for a VAR; Luetkepohl 2005, sec. 3.2).  ``param_cov`` carries
    it over to ``(a11, a12, a21, a22, b1, b2)`` with a numerical Jacobian of the log
    map (central differences, all perturbations in one batch).
    """

    name: ClassVar[str] = "discrete"
    needs_uniform_steps: ClassVar[bool] = True
    is_regression: ClassVar[bool] = True

    def __init__(self, jitter_tolerance: float = 0.01, **unknown: Any) -> None:
        from fitdyn.estimators.derivative import reject_unknown

        reject_unknown(self.name, unknown, ("jitter_tolerance",))
        tol = float(jitter_tolerance)
        if not (np.isfinite(tol) and tol >= 0):
            raise EstimationError(
                f"jitter_tolerance must be a number >= 0, got {jitter_tolerance!r}"
            )
        super().__init__(jitter_tolerance=tol)

    # -- regression form -----------------------------------------------------------
    def design(
        self,
        rec: Recording,
        equilibrium: np.ndarray | None = None,
        values: np.ndarray | None = None,
    ) -> Design:
        first, h = one_step_pairs(rec, self.settings["jitter_tolerance"])
        X = rec.values if values is None else np.asarray(values, dtype=float)
        eq = None if equilibrium is None else np.asarray(equilibrium, dtype=float).reshape(2)
        if eq is not None:
            X = X - eq
        if first[-1] - first[0] + 1 == first.size:  # one segment: views, no copies
            Z = X[..., first[0] : first[-1] + 1, :]
            Y = X[..., first[0] + 1 : first[-1] + 2, :]
        else:
            Z = X[..., first, :]
            Y = X[..., first + 1, :]
        groups = None if eq is not None else np.zeros(first.size, dtype=int)
        return Design(
            Z=Z,
            Y=Y,
            groups=groups,
            row_segment=np.asarray(rec.segment)[first + 1],
            row_trajectory=np.asarray(rec.trajectory)[first + 1],
            row_index=first + 1,
            info={"step": h, "equilibrium": eq, "first": first},
        )

    def to_system(self, C: np.ndarray, c: np.ndarray, design: Design) -> SystemBatch:
        F = np.swapaxes(np.asarray(C, dtype=float), -1, -2)
        eq = design.info.get("equilibrium")
        g = None if eq is not None else np.asarray(c, dtype=float)[:, 0, :]
        return system_from_one_step(F, g, design.info["step"], eq)

    # -- point estimate ------------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Point estimate (the one-replicate case of :meth:`fit_design`).

        Raises
        ------
        NoRealLogarithmError
            When the one-step matrix has an eigenvalue on the closed negative real axis.
        """
        d = self.design(rec, equilibrium)
        C, c = self.solve(d)
        sysb = self.to_system(C, c, d)
        if not sysb.valid[0]:
            F = C[0].T
            if not np.all(np.isfinite(F)):
                raise TooFewSamplesError(
                    "the one-step regression is singular (the samples do not vary in "
                    "two independent directions); record more varied data",
                    source=rec.source,
                )
            mu = np.linalg.eigvals(F)
            raise NoRealLogarithmError(
                f"the one-step matrix F has eigenvalues {_eig_text(mu)}, one of them real "
                "and not positive, so it has no real logarithm and no matrix A of "
                f"dx/dt = A (x - x*) gives these steps (h = {d.info['step']:.6g}): the "
                "sampling is too coarse, the data too noisy, or the system not of this "
                "form; sample with a finer step or use the 'trajectory' estimator",
                source=rec.source,
            )
        return self.make_estimate(rec, d, C[0], c[0], sysb, equilibrium)

    # -- hooks ---------------------------------------------------------------------------
    def _one_step_covariance(self, d: Design, rcov: np.ndarray) -> np.ndarray:
        """OLS covariance of (F11, F12, F21, F22[, g1, g2])."""
        Z = np.asarray(d.Z, dtype=float)
        X = np.column_stack([Z, np.ones(Z.shape[0])]) if d.groups is not None else Z
        # (X'X)^{-1} from a QR factor of the column-scaled regressors
        sc = np.sqrt(np.mean(X * X, axis=0))
        sc = np.where(sc > 0, sc, 1.0)
        R = np.linalg.qr(X / sc, mode="r")
        Rinv = np.linalg.inv(R)
        XtXi = (Rinv @ Rinv.T) / np.outer(sc, sc)
        p = X.shape[1]
        n_par = 2 * p
        order = []  # theta index of (equation i, regressor j)
        for i in range(2):
            for j in range(p):
                order.append(2 * i + j if j < 2 else 4 + i)
        cov = np.empty((n_par, n_par))
        for a, (i, j) in enumerate((i, j) for i in range(2) for j in range(p)):
            for b_, (k, l) in enumerate((k, l) for k in range(2) for l in range(p)):
                cov[order[a], order[b_]] = rcov[i, k] * XtXi[j, l]
        return cov

    def _theta_map(self, theta: np.ndarray, d: Design) -> np.ndarray:
        """(F, g) parameters (B, 6) or (B, 4) -> (a11, a12, a21, a22, b1, b2) (B, 6)."""
        F = theta[:, :4].reshape(-1, 2, 2)
        eq = d.info.get("equilibrium")
        g = None if eq is not None else theta[:, 4:6]
        sysb = system_from_one_step(F, g, d.info["step"], eq)
        return np.concatenate([sysb.matrix.reshape(-1, 4), sysb.offset], axis=1)

    def parameter_covariance(
        self, d: Design, C: np.ndarray, c: np.ndarray, rcov: np.ndarray, sysb: SystemBatch
    ) -> np.ndarray | None:
        if not sysb.valid[0]:
            return None
        cov_theta = self._one_step_covariance(d, rcov)
        theta = C.T.reshape(4)
        if d.groups is not None:
            theta = np.concatenate([theta, c[0]])
        k = theta.size
        scale = max(float(np.max(np.abs(theta))), 1e-300)
        eps = 1e-6 * np.maximum(np.abs(theta), 1e-3 * scale)
        pert = np.concatenate([theta + np.diag(eps), theta - np.diag(eps)])
        out = self._theta_map(pert, d)
        if not np.all(np.isfinite(out)):
            return None
        J = (out[:k] - out[k:]).T / (2.0 * eps)  # (6, k)
        cov = J @ cov_theta @ J.T
        return 0.5 * (cov + cov.T)

    def warnings(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        out = []
        lam = linalg2.eigvals(sysb.matrix[0])
        h = d.info["step"]
        wh = float(np.max(np.abs(lam.imag))) * h
        if wh > ALIASING_LIMIT:
            out.append(
                f"aliasing risk: |Im lambda| * h = {wh:.3g} exceeds pi/2 (the principal "
                f"logarithm assumes it is below pi); the oscillation is sampled fewer than "
                f"{2 * np.pi / wh:.3g} times per period; sample with a finer step"
            )
        return out

    def notes(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        return [
            f"one-step least squares over {d.n_rows} pairs of consecutive samples, "
            f"step h = {d.info['step']:.6g}; A = log(F) / h on the principal branch"
        ]

    def extra(
        self, rec: Recording, d: Design, C: np.ndarray, c: np.ndarray, sysb: SystemBatch
    ) -> dict[str, Any]:
        resid = d.Y - d.Z @ C
        if d.groups is not None:
            resid = resid - c[d.groups]
        dof = max(d.n_rows - d.n_coef - d.n_groups, 1)
        rcov = resid.T @ resid / dof
        g = c[0] if d.groups is not None else np.zeros(2)
        return {
            "one_step_matrix": C.T.copy(),
            "one_step_constant": np.asarray(g, dtype=float).copy(),
            "step": d.info["step"],
            "one_step_covariance": self._one_step_covariance(d, rcov),
        }


class BiasCorrection(NamedTuple):
    """Result of :func:`bias_correction`.

    Attributes
    ----------
    theta : ndarray, shape (k,)
        The corrected coefficients ``theta_hat - bias`` (``theta_hat`` when not
        usable).
    bias : ndarray, shape (k,)
        The estimated bias (zeros when not usable).
    usable : bool
        Whether the corrected coefficients form a real system (replicates can be
        generated from it).
    crossed : bool
        Whether the correction changes the stability verdict of the point estimate;
        the point estimate must then stay uncorrected.
    warning : str or None
        What the user must be told.
    """

    theta: np.ndarray
    bias: np.ndarray
    usable: bool
    crossed: bool
    warning: str | None


def bias_correction(
    theta_hat: np.ndarray,
    theta_star: np.ndarray,
    stable_of: Any,
    theta_model: np.ndarray | None = None,
) -> BiasCorrection:
    """Bootstrap bias correction of a coefficient vector (Kilian 1998, first stage).

    The bias of the estimator is estimated by the mean of the bootstrap replicates
    minus the coefficients they were generated from (``theta_model``, by default
    the point estimate), and subtracted from the point estimate:
    ``theta_tilde = theta_hat - bias``.  Called again with replicates generated from
    ``theta_tilde`` it iterates towards the coefficients whose bootstrap mean is the
    point estimate (the bias is then evaluated nearer the truth).

    Unlike Kilian's rule, which shrinks the correction until the corrected model is
    stationary, the correction here never decides stability: when the corrected
    coefficients would cross the stability boundary, ``crossed`` is set and the
    warning says that the point estimate is kept uncorrected.

    Parameters
    ----------
    theta_hat : ndarray, shape (k,)
        Point estimate of the coefficients (e.g. F and g flattened).
    theta_star : ndarray, shape (B, k)
        Bootstrap replicates of the same coefficients (non-finite rows are ignored
        in the mean; they are counted elsewhere).
    stable_of : callable
        ``stable_of(theta)`` for ``theta`` of shape (n, k) returns a pair of bool
        arrays ``(valid, stable)`` of shape (n,).
    theta_model : ndarray, shape (k,), optional
        The coefficients the replicates were generated from (default ``theta_hat``).

    Returns
    -------
    BiasCorrection
    """
    theta_hat = np.asarray(theta_hat, dtype=float)
    theta_star = np.asarray(theta_star, dtype=float)
    zero = np.zeros_like(theta_hat)
    finite = np.all(np.isfinite(theta_star), axis=1)
    if finite.sum() < 2:
        return BiasCorrection(
            theta_hat, zero, False, False,
            "bias correction skipped: too few usable bootstrap replicates",
        )  # fmt: skip
    model = theta_hat if theta_model is None else np.asarray(theta_model, dtype=float)
    bias = theta_star[finite].mean(axis=0) - model
    tilde = theta_hat - bias
    valid, stable = stable_of(np.stack([theta_hat, tilde]))
    if not valid[1]:
        return BiasCorrection(
            theta_hat, zero, False, False,
            "bias correction not applied: the corrected coefficients give no real "
            "system (e.g. no real logarithm); the uncorrected estimate is kept",
        )  # fmt: skip
    if bool(stable[0]) != bool(stable[1]):
        side = "unstable" if stable[0] else "stable"
        return BiasCorrection(
            tilde, bias, True, True,
            f"the bias correction would make the point estimate {side} (it crosses the "
            "stability boundary), so the point estimate is left uncorrected; the "
            "intervals and probabilities are bias-corrected",
        )  # fmt: skip
    return BiasCorrection(tilde, bias, True, False, None)
