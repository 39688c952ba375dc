"""Resampling schemes and the interval / probability summaries of a fitted system.

Every scheme produces replicate systems ``(A*, b*)`` through the estimator's own
batched code (``design`` -> ``Estimator.solve`` -> ``to_system``
for the regression estimators), so the point estimate is the one-replicate case of
the same computation.  The recursive schemes of the one-step fit never store the
replicate series: they accumulate the regression's sums while regenerating them and
pass the normal equations (:func:`~fitdyn.estimators.base.moments_from_sums`) to
the same solve (:func:`~fitdyn.estimators.base.solve_moments`) and ``to_system``.
Replicates are generated in chunks (memory stays bounded) with no Python loop over
replicates for the regression estimators.

Schemes
-------
``residual``
    Recursive residual bootstrap for the one-step (``discrete``) fit: every segment
    is regenerated from its first observed sample as
    ``x*_{k+1} = F x*_k + g + e*_k`` with ``e*`` drawn with replacement from the
    centred residuals, rescaled by ``sqrt(m / (m - k))`` for the ``k`` coefficients
    per equation (Efron & Tibshirani, *An Introduction to the Bootstrap*, 1993,
    ch. 9; Davison & Hinkley, *Bootstrap Methods and their Application*, 1997,
    sec. 8.2, from memory).  The loop runs over time steps only (in blocks of
    steps, vectorised over replicates and segments; see :class:`_Recursion`).
``blocks``
    Moving-block bootstrap of the regression rows (Kuensch, Ann. Stat. 17, 1989):
    blocks of consecutive rows, never crossing a segment, are drawn with
    replacement; a replicate is a vector of row multiplicities passed as weights to
    the batched least squares.  The block length is chosen from the residuals by
    the rule of Politis & White (Econometric Reviews 23, 2004, with the correction
    of Patton, Politis & White 2009; from memory), at least ``m^(1/3)``.
``parametric``
    Simulate from the fitted model with the estimated noise on the same sampling
    and refit (:meth:`Estimator.fit_values`).  The noise model depends on what the
    estimator's residuals mean:

    * trajectory (output-error) fit: the residuals are measurement errors, so
      ``R`` = the residual covariance and no process noise;
    * discrete fit: the one-step residuals lump process and measurement noise
      into one innovation; replicates are regenerated recursively like ``residual``
      but with Gaussian innovations of the residual covariance;
    * derivative / integral fits: their residuals live in the regression form, not
      in the data, so the noise is estimated from the one-step prediction errors
      ``r_k = x_{k+1} - x* - expm(A h_k) (x_k - x*)`` of the fitted model by moments:
      ``Cov(r_{k+1}, r_k) = -F R`` gives the measurement covariance ``R`` and
      ``Cov(r_k) - R - F R F^T`` the one-step process covariance, mapped to a
      diffusion rate ``Q`` (see :func:`noise_model`).  Initial states are the first
      observed samples.
``cases``
    Whole trajectories resampled with replacement (multinomial weights on the
    rows), for recordings with at least five trajectories.
``auto``
    ``residual`` for the discrete fit, ``blocks`` for the other regression fits,
    ``parametric`` for the trajectory fit (see :func:`choose_scheme`).

Bias correction
---------------
Bootstrap-after-bootstrap (Kilian, Rev. Econ. Stat. 80, 1998): a first bootstrap
estimates the bias of the regression coefficients, the point estimate is corrected,
a second bootstrap is generated from the corrected model (for the regenerating
schemes) and each of its replicates is corrected by the same bias.  The correction
never decides stability: unlike Kilian's rule it is not shrunk to make the model
stable, and when it would move the point estimate across the stability boundary
the point estimate is kept uncorrected and a warning says so; the intervals and
probabilities still come from the corrected bootstrap, which benchmarks/coverage.py
shows to be the better calibrated choice near a center (coverage 0.95 against 0.92
when the whole correction is dropped) (:func:`fitdyn.estimators.discrete.bias_correction`).
On by default for the one-step fits (:func:`default_bias_correction`).

Failed replicates
-----------------
A replicate the estimator cannot map to a real system (``valid=False``, e.g. a
one-step matrix with no real logarithm) is kept and counted, never redrawn.
Intervals use the valid replicates; probabilities use *all* replicates: class
probabilities carry a separate bucket (the estimator's failure label, e.g.
``"no real logarithm"``) so that they sum to one, ``p_stable`` counts failed
replicates as not shown stable (a lower bound) and ``p_stable_upper`` counts them
as stable (the upper bound).

All results are statistical statements about a linearisation fitted to one
recording; decisions that affect safety, health or compliance defer to local codes
and licensed practice.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from fitdyn import linalg2
from fitdyn.classify import GENERIC, LABELS, classify_codes
from fitdyn.errors import EstimationError, FitdynError, InputError
from fitdyn.estimators.base import (
    Estimate,
    Estimator,
    Moments,
    SystemBatch,
    equilibrium_from,
    moments_from_sums,
    solve_moments,
)
from fitdyn.recording import Recording

__all__ = [
    "SCHEMES",
    "Uncertainty",
    "bootstrap",
    "asymptotic",
    "choose_scheme",
    "noise_model",
    "block_length",
    "summarize",
    "replicate_statistics",
]

#: Accepted values of ``scheme``.
SCHEMES: tuple[str, ...] = ("auto", "residual", "blocks", "parametric", "cases")

#: Fewest trajectories for the case bootstrap.
MIN_CASES = 5

#: Default memory budget of one chunk of replicates (bytes).
CHUNK_BYTES = 160 * 2**20

#: What to do when the bias correction would cross the stability boundary: "keep"
#: the corrected replicates (the point estimate stays uncorrected) or "drop" it all.
_CROSSED_POLICY = "keep"

#: The scalar statistics summarised (and their JSON names).
SCALARS: tuple[str, ...] = ("trace", "determinant", "discriminant", "max_real_part")


# ==================================================================================
# the result
# ==================================================================================
@dataclass(frozen=True, eq=False)
class Uncertainty:
    """Bootstrap (or asymptotic) uncertainty of a fitted 2x2 system.

    Attributes
    ----------
    replicates : int
        Number of replicates ``B`` (draws, for the asymptotic method).
    scheme : str
        The resampling scheme used (``"asymptotic (delta method)"`` for
        :func:`asymptotic`).
    confidence : float
        Confidence level of the intervals.
    seed : int or None
        The seed given.
    matrices : ndarray, shape (B, 2, 2)
        Replicate matrices ``A*`` (NaN where invalid).
    offsets : ndarray, shape (B, 2)
        Replicate ``b*``.
    equilibria : ndarray, shape (B, 2)
        Replicate equilibria (NaN where ``A*`` is singular or invalid).
    eigenvalues : ndarray, shape (B, 2), complex
        Replicate eigenvalues sorted as :func:`fitdyn.linalg2.eigvals` (the joint
        eigenvalue cloud for plots).
    valid : ndarray, shape (B,), bool
        Whether each replicate gave a real system.
    intervals : dict
        Name -> ``(lo, hi)`` or nested tuples (see :meth:`to_dict`); ``inf`` marks an
        unbounded side, NaN an interval that cannot be formed.
    class_probabilities : dict
        Generic class label -> fraction of all replicates (plus the failure bucket,
        and any boundary label hit exactly).
    p_stable : float
        Fraction of all replicates with a valid, asymptotically stable system.
    consistent_with : list of str
        Boundary classes the intervals cannot exclude.
    margin_probabilities : dict or None
        Class probabilities with the practical-equivalence margin (boundary classes
        included), or None without a margin.
    bias_corrected : bool
        Whether the bias correction was applied.
    warnings : tuple of str
        Things the user must know.
    method : str
        Interval method (``"percentile"``, ``"bca"`` or ``"delta"``).
    failed_replicates : int
        Number of invalid replicates.
    failure_label : str
        Bucket name of invalid replicates in the probabilities.
    p_stable_upper : float
        ``p_stable`` counting failed replicates as stable.
    margin : float or None
        The practical-equivalence margin.
    point_matrix, point_offset : ndarray
        The point estimate the intervals go with (bias-corrected when
        ``bias_corrected``).
    defined_fraction : dict
        For statistics defined on part of the replicates only (period, damping
        ratio, equilibrium): the fraction of valid replicates where they are.
    notes : tuple of str
        How the replicates were made (block length, noise model...).
    """

    replicates: int
    scheme: str
    confidence: float
    seed: Any
    matrices: np.ndarray
    offsets: np.ndarray
    equilibria: np.ndarray
    eigenvalues: np.ndarray
    valid: np.ndarray
    intervals: dict[str, Any]
    class_probabilities: dict[str, float]
    p_stable: float
    consistent_with: list[str]
    margin_probabilities: dict[str, float] | None
    bias_corrected: bool
    warnings: tuple[str, ...] = ()
    method: str = "percentile"
    failed_replicates: int = 0
    failure_label: str = "failed fit"
    p_stable_upper: float = float("nan")
    margin: float | None = None
    point_matrix: np.ndarray = field(default_factory=lambda: np.full((2, 2), np.nan))
    point_offset: np.ndarray = field(default_factory=lambda: np.full(2, np.nan))
    defined_fraction: dict[str, float] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    # -- accessors ------------------------------------------------------------------
    def interval(self, name: str) -> Any:
        """The interval of one statistic (see :meth:`to_dict` for the names)."""
        return self.intervals[name]

    def eigenvalue_intervals(self) -> list[tuple[tuple[float, float], tuple[float, float]]]:
        """``[((re_lo, re_hi), (im_lo, im_hi)), ...]`` for the two sorted eigenvalues."""
        re = self.intervals["eigenvalue_real"]
        im = self.intervals["eigenvalue_imag"]
        return [(tuple(re[k]), tuple(im[k])) for k in range(2)]

    def verdict(self) -> tuple[str, float]:
        """The most probable class and its probability."""
        label = max(self.class_probabilities, key=self.class_probabilities.get)
        return label, float(self.class_probabilities[label])

    # -- output ----------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (the ``"uncertainty"`` block of the fit's JSON).

        Layout::

            {"replicates": B, "scheme": str, "confidence": c, "method": str,
             "intervals": {"trace": [lo, hi], "determinant": [lo, hi],
                           "discriminant": [lo, hi], "max_real_part": [lo, hi],
                           "eigenvalue_real": [[lo, hi], [lo, hi]],
                           "eigenvalue_imag": [[lo, hi], [lo, hi]],
                           "matrix": [[[lo, hi], [lo, hi]], [[lo, hi], [lo, hi]]],
                           "offset": [[lo, hi], [lo, hi]],
                           "equilibrium": [[lo, hi], [lo, hi]] or null,
                           "time_constants": [[lo, hi], [lo, hi]],
                           "period": [lo, hi] or null,
                           "damping_ratio": [lo, hi] or null},
             "class_probabilities": {label: p}, "p_stable": p,
             "p_stable_upper": p, "consistent_with": [label, ...],
             "margin": m or null, "margin_probabilities": {label: p} or null,
             "failed_replicates": n, "failure_label": str,
             "bias_corrected": bool, "defined_fraction": {name: f},
             "seed": seed, "warnings": [str], "notes": [str],
             "point_matrix": [[a11, a12], [a21, a22]],
             "point_eigenvalues": [[re, im], [re, im]]}

        ``point_matrix`` is the estimate the intervals go with: the bias-corrected
        one when ``bias_corrected`` (unless the correction would cross the stability
        boundary, see the warnings).

        Unbounded interval sides (a time constant when a real part may be 0) and
        undefined values are ``null``.
        """
        return {
            "replicates": int(self.replicates),
            "scheme": self.scheme,
            "confidence": float(self.confidence),
            "method": self.method,
            "intervals": {k: _json_interval(v) for k, v in self.intervals.items()},
            "class_probabilities": {k: float(v) for k, v in self.class_probabilities.items()},
            "p_stable": float(self.p_stable),
            "p_stable_upper": float(self.p_stable_upper),
            "consistent_with": list(self.consistent_with),
            "margin": None if self.margin is None else float(self.margin),
            "margin_probabilities": (
                None
                if self.margin_probabilities is None
                else {k: float(v) for k, v in self.margin_probabilities.items()}
            ),
            "failed_replicates": int(self.failed_replicates),
            "failure_label": self.failure_label,
            "bias_corrected": bool(self.bias_corrected),
            "defined_fraction": {k: float(v) for k, v in self.defined_fraction.items()},
            "seed": _json_seed(self.seed),
            "point_matrix": _nan_to_none(np.asarray(self.point_matrix, float).tolist()),
            "point_eigenvalues": [
                [float(z.real), float(z.imag)]
                for z in linalg2.eigvals(np.asarray(self.point_matrix, float)[None])[0]
            ],
            "warnings": list(self.warnings),
            "notes": list(self.notes),
        }

    def summary_lines(self, digits: int = 3, time_unit: str | None = None) -> list[str]:
        """Printable rows such as ``"lambda1 = -0.10 [-0.12, -0.08]"``."""
        f = _fmt(digits)
        unit = f" {time_unit}" if time_unit else ""
        c = int(round(100 * self.confidence))
        lam = linalg2.eigvals(self.point_matrix[None])[0]
        lines = [
            f"uncertainty     {self.scheme}, {self.replicates} replicates, {c} % {self.method}"
        ]
        re = self.intervals["eigenvalue_real"]
        im = self.intervals["eigenvalue_imag"]
        for k in range(2):
            z = lam[k]
            if abs(z.imag) > 0:
                lines.append(
                    f"lambda{k + 1} = {f(z.real)} {'+' if z.imag >= 0 else '-'} "
                    f"{f(abs(z.imag))}i   Re [{f(re[k][0])}, {f(re[k][1])}]  "
                    f"Im [{f(im[k][0])}, {f(im[k][1])}]"
                )
            else:
                lines.append(f"lambda{k + 1} = {f(z.real)} [{f(re[k][0])}, {f(re[k][1])}]")
        tau, det, disc = linalg2.invariants(self.point_matrix)
        for name, val in (("trace", tau), ("determinant", det), ("discriminant", disc)):
            lo, hi = self.intervals[name]
            lines.append(f"{name:<15} {f(val)} [{f(lo)}, {f(hi)}]")
        lo, hi = self.intervals["max_real_part"]
        lines.append(f"{'max real part':<15} {f(float(np.max(lam.real)))} [{f(lo)}, {f(hi)}]")
        tc = self.intervals["time_constants"]
        lines.append(
            "time constants  "
            + ", ".join(f"[{f(tc[k][0])}, {f(tc[k][1])}]{unit}" for k in range(2))
        )
        for name in ("period", "damping_ratio"):
            iv = self.intervals.get(name)
            if iv is not None and np.all(np.isfinite(iv)):
                frac = self.defined_fraction.get(name, 1.0)
                tail = "" if frac >= 0.999 else f" (defined in {100 * frac:.0f} % of replicates)"
                u = unit if name == "period" else ""
                lines.append(f"{name.replace('_', ' '):<15} [{f(iv[0])}, {f(iv[1])}]{u}{tail}")
        label, p = self.verdict()
        lines.append(f"class           {label} (P = {p:.3g}); stable with P = {self.p_stable:.3g}")
        probs = ", ".join(
            f"{k} {v:.3g}" for k, v in sorted(self.class_probabilities.items(), key=lambda t: -t[1])
        )
        lines.append(f"probabilities   {probs}")
        if self.consistent_with:
            lines.append(f"consistent with {', '.join(self.consistent_with)}")
        if self.margin_probabilities is not None:
            mp = ", ".join(
                f"{k} {v:.3g}"
                for k, v in sorted(self.margin_probabilities.items(), key=lambda t: -t[1])
                if v > 0
            )
            lines.append(f"with margin {self.margin:g}: {mp}")
        if self.failed_replicates:
            lines.append(
                f"failed          {self.failed_replicates} replicates ({self.failure_label})"
            )
        for w in self.warnings:
            lines.append(f"warning: {w}")
        return lines

    def summary(self) -> str:
        """:meth:`summary_lines` joined."""
        return "\n".join(self.summary_lines())

    def __str__(self) -> str:
        return self.summary()


def _json_seed(seed: Any) -> Any:
    if seed is None or isinstance(seed, bool):
        return seed
    if isinstance(seed, int | np.integer):
        return int(seed)
    if isinstance(seed, list | tuple) and all(isinstance(v, int | np.integer) for v in seed):
        return [int(v) for v in seed]
    return repr(seed)


def _fmt(digits: int):
    def f(v: float) -> str:
        v = float(v)
        if np.isnan(v):
            return "n/a"
        if np.isinf(v):
            return "inf" if v > 0 else "-inf"
        return f"{v:.{digits}g}"

    return f


def _json_interval(v: Any) -> Any:
    if v is None:
        return None
    arr = np.asarray(v, dtype=float)
    if arr.size and np.all(np.isnan(arr)):
        return None
    return _nan_to_none(arr.tolist())


def _nan_to_none(x: Any) -> Any:
    if isinstance(x, list):
        return [_nan_to_none(v) for v in x]
    return None if not np.isfinite(x) else float(x)


# ==================================================================================
# statistics of replicate systems
# ==================================================================================
def replicate_statistics(matrix: np.ndarray, offset: np.ndarray) -> dict[str, np.ndarray]:
    """Every summarised statistic of a batch of systems.

    Parameters
    ----------
    matrix : ndarray, shape (B, 2, 2)
    offset : ndarray, shape (B, 2)

    Returns
    -------
    dict
        ``matrix`` (B, 2, 2), ``offset`` (B, 2), ``equilibrium`` (B, 2; NaN where
        ``A`` is singular), ``trace``, ``determinant``, ``discriminant``,
        ``max_real_part`` (B,), ``eigenvalue_real``, ``eigenvalue_imag`` (B, 2),
        ``eigenvalues`` (B, 2) complex, ``period`` and ``damping_ratio`` (B,; NaN for
        real eigenvalues), ``deviation`` (B, 3): the entries (1,1), (1,2), (2,1) of
        ``A - (tau / 2) I``.
    """
    A = np.asarray(matrix, dtype=float)
    b = np.asarray(offset, dtype=float)
    tau, det, disc = linalg2.invariants(A)
    lam = linalg2.eigvals(A)
    with np.errstate(invalid="ignore", divide="ignore"):
        spiral = lam[:, 0].imag > 0
        period = np.where(spiral, 2 * np.pi / np.where(spiral, lam[:, 0].imag, 1.0), np.nan)
        damping = np.where(spiral, -lam[:, 0].real / np.abs(lam[:, 0]), np.nan)
    dev = A - 0.5 * tau[:, None, None] * np.eye(2)
    return {
        "matrix": A,
        "offset": b,
        "equilibrium": equilibrium_from(A, b),
        "trace": tau,
        "determinant": det,
        "discriminant": disc,
        "max_real_part": lam.real[:, 0],
        "eigenvalue_real": lam.real,
        "eigenvalue_imag": lam.imag,
        "eigenvalues": lam,
        "period": period,
        "damping_ratio": damping,
        "deviation": np.stack([dev[:, 0, 0], dev[:, 0, 1], dev[:, 1, 0]], axis=1),
    }


def _norm_ppf(p: np.ndarray) -> np.ndarray:
    from scipy.special import ndtri

    return ndtri(p)


def _norm_cdf(x: np.ndarray) -> np.ndarray:
    from scipy.special import ndtr

    return ndtr(x)


def _quantiles(x: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """Quantiles of the finite values of ``x`` (B, ...) at ``probs`` (..., 2)."""
    x = np.asarray(x, dtype=float)
    flat = x.reshape(x.shape[0], -1)
    probs = np.asarray(probs, dtype=float)
    P = np.broadcast_to(probs.reshape(-1, 2) if probs.ndim > 1 else probs, flat.shape[1:] + (2,))
    out = np.full(flat.shape[1:] + (2,), np.nan)
    for j in range(flat.shape[1]):
        col = flat[:, j]
        col = col[np.isfinite(col)]
        if col.size >= 2:
            out[j] = np.quantile(col, P[j])
    return out.reshape(x.shape[1:] + (2,))


def _bca_probs(
    reps: np.ndarray, point: np.ndarray, jack: np.ndarray | None, alpha: float
) -> tuple[np.ndarray, bool]:
    """BCa percentile levels (Efron, JASA 82, 1987) for each column; fallback flag."""
    flat = reps.reshape(reps.shape[0], -1)
    pt = np.asarray(point, dtype=float).reshape(-1)
    probs = np.tile(np.array([alpha / 2, 1 - alpha / 2]), (flat.shape[1], 1))
    fell_back = False
    z = _norm_ppf(np.array([alpha / 2, 1 - alpha / 2]))
    for j in range(flat.shape[1]):
        col = flat[:, j]
        col = col[np.isfinite(col)]
        if col.size < 2 or not np.isfinite(pt[j]):
            continue
        frac = (np.sum(col < pt[j]) + 0.5 * np.sum(col == pt[j])) / col.size
        if frac <= 0 or frac >= 1:
            fell_back = True
            continue
        z0 = float(_norm_ppf(frac))
        a = 0.0
        if jack is not None:
            jc = jack.reshape(jack.shape[0], -1)[:, j]
            jc = jc[np.isfinite(jc)]
            if jc.size >= 3:
                d = jc.mean() - jc
                den = 6.0 * np.sum(d * d) ** 1.5
                a = float(np.sum(d**3) / den) if den > 0 else 0.0
        zz = z0 + (z0 + z) / (1 - a * (z0 + z))
        probs[j] = _norm_cdf(zz)
    return probs.reshape(reps.shape[1:] + (2,)), fell_back


def _time_constant_interval(re_iv: np.ndarray) -> np.ndarray:
    """1 / |Re lambda| interval from a Re lambda interval (monotone transform)."""
    lo, hi = float(re_iv[0]), float(re_iv[1])
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return np.array([np.nan, np.nan])
    big = max(abs(lo), abs(hi))
    with np.errstate(divide="ignore"):
        if lo > 0 or hi < 0:
            return np.array([1.0 / big, 1.0 / min(abs(lo), abs(hi))])
        return np.array([1.0 / big if big > 0 else np.inf, np.inf])


def _zero_in_region(X: np.ndarray, confidence: float) -> bool:
    """Whether 0 lies in the Mahalanobis region of the cloud ``X`` (n, k) at confidence."""
    X = X[np.all(np.isfinite(X), axis=1)]
    if X.shape[0] < X.shape[1] + 2:
        return False
    mu = X.mean(axis=0)
    S = np.cov(X, rowvar=False)
    Si = np.linalg.pinv(S)
    d = X - mu
    d2 = np.einsum("ni,ij,nj->n", d, Si, d)
    d0 = float(mu @ Si @ mu)
    return bool(d0 <= np.quantile(d2, confidence))


def _signed(label: str, tr: tuple[float, float]) -> list[str]:
    out = []
    if tr[0] < 0:
        out.append(f"stable {label}")
    if tr[1] > 0:
        out.append(f"unstable {label}")
    return out


def consistent_classes(
    intervals: dict[str, Any], deviation: np.ndarray, confidence: float
) -> list[str]:
    """Boundary classes the intervals cannot exclude.

    Rules (intervals at the chosen confidence):

    * ``non-isolated equilibria`` when the determinant interval contains 0;
    * ``center`` when the trace interval contains 0 and the determinant interval
      reaches above 0 (on ``tau = 0`` the condition ``tau^2 < 4 Delta`` reduces to
      ``Delta > 0``, so the discriminant adds nothing there);
    * ``stable`` / ``unstable degenerate node`` when the discriminant interval
      contains 0, with the sign(s) the trace interval allows;
    * ``stable`` / ``unstable star`` when in addition the joint region of the three
      free entries of ``A - (tau / 2) I`` (a Mahalanobis region of the replicate
      cloud at the same confidence) contains zero: a star needs all three to vanish,
      which a norm's interval could never show since a norm is never negative.

    Parameters
    ----------
    intervals : dict
        At least ``trace``, ``determinant``, ``discriminant``.
    deviation : ndarray, shape (B, 3)
        Replicate entries of ``A - (tau / 2) I``.
    confidence : float

    Returns
    -------
    list of str
        In the order of :data:`fitdyn.classify.LABELS`.
    """
    tr = tuple(intervals["trace"])
    de = tuple(intervals["determinant"])
    di = tuple(intervals["discriminant"])
    found: set[str] = set()
    if not all(np.isfinite(v) for v in (*tr, *de, *di)):
        return []
    if de[0] <= 0 <= de[1]:
        found.add("non-isolated equilibria")
    if tr[0] <= 0 <= tr[1] and de[1] > 0:
        found.add("center")
    if di[0] <= 0 <= di[1]:
        found.update(_signed("degenerate node", tr))
        if _zero_in_region(deviation, confidence):
            found.update(_signed("star", tr))
    return [lab for lab in LABELS if lab in found]


def margin_codes(matrix: np.ndarray, margin: float) -> np.ndarray:
    """Class codes with a practical-equivalence margin (boundary classes included).

    With eigenvalues ``lambda1, lambda2`` (sorted), ``rho = max |lambda|``:

    * non-isolated equilibria: ``min |lambda| / max |lambda| < margin``;
    * center: a complex pair whose amplitude changes by less than ``margin`` per
      cycle, ``|exp(2 pi Re lambda / |Im lambda|) - 1| < margin``;
    * star: ``|lambda1 - lambda2| / rho < margin`` and
      ``||A - (tau / 2) I||_F / rho < margin``;
    * degenerate node: ``|lambda1 - lambda2| / rho < margin`` otherwise;
    * the generic class (``classify_codes(rtol=0)``) in every other case.

    The first rule that applies wins (in this order).

    Parameters
    ----------
    matrix : ndarray, shape (B, 2, 2)
    margin : float

    Returns
    -------
    int ndarray, shape (B,)
        Codes into :data:`fitdyn.classify.LABELS`.
    """
    A = np.asarray(matrix, dtype=float)
    codes, _ = classify_codes(A, rtol=0.0)
    codes = codes.astype(int)
    tau, _, _ = linalg2.invariants(A)
    lam = linalg2.eigvals(A)
    mags = np.abs(lam)
    rho = mags.max(axis=1)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        flat = mags.min(axis=1) < margin * rho
        im = np.abs(lam[:, 0].imag)
        cyc = np.abs(np.expm1(2 * np.pi * lam[:, 0].real / np.where(im > 0, im, 1.0)))
        centre = (im > 0) & (cyc < margin)
        rep = np.abs(lam[:, 0] - lam[:, 1]) < margin * rho
        dev = A - 0.5 * tau[:, None, None] * np.eye(2)
        devn = np.sqrt(np.sum(dev * dev, axis=(1, 2)))
        star = rep & (devn < margin * rho)
    neg = tau < 0
    out = np.select(
        [
            flat | (rho == 0),
            centre,
            star & neg,
            star & ~neg,
            rep & neg,
            rep & ~neg,
        ],
        [10, 5, 6, 7, 8, 9],
        default=codes,
    )
    return out


def _probabilities(codes: np.ndarray, valid: np.ndarray, failure_label: str) -> dict[str, float]:
    B = valid.size
    counts = np.bincount(codes[valid], minlength=len(LABELS)) if valid.any() else np.zeros(11)
    out = {lab: float(counts[i]) / B for i, lab in enumerate(LABELS) if lab in GENERIC}
    for i, lab in enumerate(LABELS):
        if lab not in GENERIC and counts[i] > 0:
            out[lab] = float(counts[i]) / B
    nf = int(B - valid.sum())
    if nf:
        out[failure_label] = nf / B
    return out


def summarize(
    matrices: np.ndarray,
    offsets: np.ndarray,
    valid: np.ndarray,
    point_matrix: np.ndarray,
    point_offset: np.ndarray,
    *,
    confidence: float = 0.95,
    method: str = "percentile",
    jackknife: tuple[np.ndarray, np.ndarray] | None = None,
    margin: float | None = None,
    scheme: str = "given",
    seed: Any = None,
    bias_corrected: bool = False,
    failure_label: str = "failed fit",
    warnings: tuple[str, ...] = (),
    notes: tuple[str, ...] = (),
    delta_intervals: dict[str, Any] | None = None,
) -> Uncertainty:
    """Summaries of a cloud of replicate systems.

    This is the pure-array half of :func:`bootstrap`; tests and other callers may
    pass any cloud.

    Parameters
    ----------
    matrices : ndarray, shape (B, 2, 2)
    offsets : ndarray, shape (B, 2)
    valid : bool ndarray, shape (B,)
    point_matrix, point_offset : ndarray
        The point estimate (used by BCa and the printed summary).
    confidence : float
        Between 0 and 1.
    method : {"percentile", "bca"}
        Interval method; BCa needs ``jackknife`` for the acceleration (otherwise the
        acceleration is 0, i.e. bias-corrected percentile intervals).
    jackknife : (matrices, offsets), optional
        Jackknife systems for the BCa acceleration.
    margin : float, optional
        Practical-equivalence margin for :func:`margin_codes`.
    delta_intervals : dict, optional
        Intervals computed elsewhere (the delta method) that replace the percentile
        ones.

    Returns
    -------
    Uncertainty
    """
    if not 0 < confidence < 1:
        raise EstimationError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    if method not in ("percentile", "bca", "delta"):
        raise EstimationError(f"method must be 'percentile' or 'bca', got {method!r}")
    valid = np.asarray(valid, dtype=bool)
    B = int(valid.size)
    A = np.where(valid[:, None, None], np.asarray(matrices, dtype=float), np.nan)
    b = np.where(valid[:, None], np.asarray(offsets, dtype=float), np.nan)
    st = replicate_statistics(A, b)
    pt = replicate_statistics(
        np.asarray(point_matrix, float)[None], np.asarray(point_offset, float)[None]
    )
    alpha = 1.0 - confidence
    warn = list(warnings)
    nv = int(valid.sum())
    names = (*SCALARS, "eigenvalue_real", "eigenvalue_imag", "matrix", "offset",
             "equilibrium", "period", "damping_ratio")  # fmt: skip
    intervals: dict[str, Any] = {}
    defined: dict[str, float] = {}
    jst = None
    if method == "bca" and jackknife is not None:
        jst = replicate_statistics(*jackknife)
    fell_back = False
    for name in names:
        x = st[name][valid]
        if name in ("period", "damping_ratio", "equilibrium"):
            fin = np.all(np.isfinite(x.reshape(x.shape[0], -1)), axis=1) if nv else np.zeros(0)
            defined[name] = float(fin.mean()) if nv else 0.0
        if delta_intervals is not None:
            continue
        if method == "bca":
            probs, fb = _bca_probs(x, pt[name][0], None if jst is None else jst[name], alpha)
            fell_back |= fb
        else:
            probs = np.array([alpha / 2, 1 - alpha / 2])
        q = _quantiles(x, probs) if nv >= 2 else np.full(x.shape[1:] + (2,), np.nan)
        intervals[name] = q
    if delta_intervals is not None:
        intervals = {k: np.asarray(v, dtype=float) for k, v in delta_intervals.items()}
    if fell_back:
        warn.append(
            "BCa fell back to percentile levels for a statistic whose replicates all lie "
            "on one side of the point estimate"
        )
    intervals["time_constants"] = np.stack(
        [_time_constant_interval(intervals["eigenvalue_real"][k]) for k in range(2)]
    )
    for name in ("period", "damping_ratio", "equilibrium"):
        if defined.get(name, 0.0) == 0.0 or np.all(np.isnan(intervals[name])):
            intervals[name] = None
    ivs = {
        k: (None if v is None else _tuplify(np.asarray(v, dtype=float)))
        for k, v in intervals.items()
    }
    codes, _ = classify_codes(np.where(valid[:, None, None], A, 0.0), rtol=0.0)
    codes = codes.astype(int)
    probs_c = _probabilities(codes, valid, failure_label)
    stable = valid & (st["max_real_part"] < 0)
    p_stable = float(stable.sum()) / B if B else float("nan")
    p_upper = float(stable.sum() + (B - nv)) / B if B else float("nan")
    cons = consistent_classes(ivs, st["deviation"][valid], confidence) if nv >= 2 else []
    mprobs = None
    if margin is not None:
        if not margin > 0:
            raise EstimationError(f"margin must be positive, got {margin!r}")
        mcodes = margin_codes(np.where(valid[:, None, None], A, 0.0), float(margin))
        mprobs = {lab: 0.0 for lab in LABELS}
        mprobs.update(_probabilities(mcodes, valid, failure_label))
    if B and nv < B:
        warn.append(
            f"{B - nv} of {B} replicates failed ({failure_label}); they are kept in the "
            "probabilities (see failed_replicates) and left out of the intervals"
        )
    if nv < 2:
        warn.append("fewer than two valid replicates: no intervals")
    return Uncertainty(
        replicates=B,
        scheme=scheme,
        confidence=float(confidence),
        seed=seed,
        matrices=A,
        offsets=b,
        equilibria=st["equilibrium"],
        eigenvalues=st["eigenvalues"],
        valid=valid,
        intervals=ivs,
        class_probabilities=probs_c,
        p_stable=p_stable,
        consistent_with=cons,
        margin_probabilities=mprobs,
        bias_corrected=bool(bias_corrected),
        warnings=tuple(warn),
        method=method,
        failed_replicates=B - nv,
        failure_label=failure_label,
        p_stable_upper=p_upper,
        margin=None if margin is None else float(margin),
        point_matrix=np.asarray(point_matrix, dtype=float),
        point_offset=np.asarray(point_offset, dtype=float),
        defined_fraction=defined,
        notes=tuple(notes),
    )


def _tuplify(a: np.ndarray) -> Any:
    if a.ndim == 1:
        return (float(a[0]), float(a[1]))
    return tuple(_tuplify(x) for x in a)


# ==================================================================================
# choosing a scheme, block length, noise model
# ==================================================================================
def choose_scheme(estimator: Estimator, rec: Recording) -> tuple[str, str]:
    """The default scheme for an estimator and a recording, and why.

    Returns
    -------
    scheme, reason : str
    """
    if not estimator.is_regression:
        return "parametric", (
            f"parametric bootstrap (the '{estimator.name}' fit is not a linear regression; "
            "replicates are simulated from the fitted model with its estimated noise)"
        )
    if estimator.name == "discrete":
        return "residual", (
            "recursive residual bootstrap (each segment regenerated from its first sample)"
        )
    if estimator.name == "instrumental":
        return "parametric", (
            "parametric bootstrap from the fitted model with process and measurement "
            "noise (the one-step errors are serially correlated, so residuals cannot be "
            "redrawn independently)"
        )
    return "blocks", "moving-block bootstrap of the regression rows (rows are correlated)"


def _acf(x: np.ndarray, maxlag: int) -> np.ndarray:
    x = x - x.mean()
    n = x.size
    den = float(x @ x)
    if den <= 0:
        return np.zeros(maxlag + 1)
    return np.array([float(x[: n - k] @ x[k:]) / den for k in range(maxlag + 1)])


def _politis_white(x: np.ndarray) -> float:
    """Politis-White (2004) optimal moving-block length of one series (from memory)."""
    n = x.size
    if n < 8:
        return 1.0
    kn = max(5, int(np.ceil(np.log10(n))))
    mmax = int(np.ceil(np.sqrt(n))) + kn
    mmax = min(mmax, n - 1)
    rho = _acf(x, mmax)
    crit = 2.0 * np.sqrt(np.log10(n) / n)
    # smallest lag m after which kn consecutive autocorrelations are insignificant
    mhat = mmax
    for m in range(1, mmax - kn + 2):
        if np.all(np.abs(rho[m : m + kn]) < crit):
            mhat = m - 1 if m > 1 else 1
            break
    M = min(2 * max(mhat, 1), mmax)
    xc = x - x.mean()
    gam = np.array([float(xc[: n - k] @ xc[k:]) / n for k in range(M + 1)])
    k = np.arange(-M, M + 1)
    t = np.abs(k) / M
    lam = np.where(t <= 0.5, 1.0, np.where(t <= 1.0, 2.0 * (1.0 - t), 0.0))
    g = gam[np.abs(k)]
    G = float(np.sum(lam * np.abs(k) * g))
    s0 = float(np.sum(lam * g))
    D = 4.0 / 3.0 * s0 * s0
    if D <= 0:
        return 1.0
    return float((2.0 * G * G / D) ** (1.0 / 3.0) * n ** (1.0 / 3.0))


def block_length(residuals: np.ndarray, row_segment: np.ndarray) -> int:
    """Block length for the moving-block bootstrap of regression rows.

    The larger of ``m^(1/3)`` (``m`` rows of the longest segment) and the
    Politis-White estimate on each residual channel of that segment, capped at a
    third of that segment.

    Parameters
    ----------
    residuals : ndarray, shape (m, k)
    row_segment : int ndarray, shape (m,)

    Returns
    -------
    int
    """
    seg = np.asarray(row_segment)
    vals, counts = np.unique(seg, return_counts=True)
    longest = vals[np.argmax(counts)]
    r = np.asarray(residuals, dtype=float)[seg == longest]
    m = r.shape[0]
    est = max([_politis_white(r[:, j]) for j in range(r.shape[1])] + [m ** (1.0 / 3.0)])
    return int(max(1, min(round(est), max(1, m // 3))))


def _min_norm_equilibrium(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    eq = equilibrium_from(A[None], b[None])[0]
    if np.all(np.isfinite(eq)):
        return eq
    return -np.linalg.lstsq(A, b, rcond=None)[0]


def noise_model(
    rec: Recording, matrix: np.ndarray, offset: np.ndarray
) -> tuple[np.ndarray, np.ndarray, str]:
    """Process and measurement noise of a fitted model, by moments of one-step errors.

    For consecutive samples within a segment, the one-step prediction errors of the
    model ``r_k = x_{k+1} - x* - F_k (x_k - x*)`` (``F_k = expm(A h_k)``) are, under
    ``dx = A (x - x*) dt + Q^{1/2} dW`` and ``y = x + e``, ``e ~ N(0, R)``:
    ``r_k = w_k + e_{k+1} - F_k e_k``, so ``Cov(r_{k+1}, r_k) = -F_{k+1} R`` and
    ``Cov(r_k) = W(h_k) + R + F_k R F_k^T`` with ``W(h) = int_0^h e^{As} Q e^{A^T s} ds``.
    ``R`` is the symmetrised mean of ``-F_{k+1}^{-1} r_{k+1} r_k^T``; ``W`` at the mean
    step ``hbar`` is ``hbar / sum(h_k)`` times the sum of ``r_k r_k^T - R - F_k R F_k^T``
    (a ratio of sums, stable when some steps are tiny), mapped linearly to ``Q``.
    Both are clipped to positive semi-definite.

    Returns
    -------
    Q : ndarray, shape (2, 2)
        Diffusion covariance rate.
    R : ndarray, shape (2, 2)
        Measurement covariance.
    note : str
        A description for the notes.
    """
    A = np.asarray(matrix, dtype=float)
    eq = _min_norm_equilibrium(A, np.asarray(offset, dtype=float))
    seg = np.asarray(rec.segment)
    first = np.flatnonzero(seg[1:] == seg[:-1])
    h = rec.times[first + 1] - rec.times[first]
    dev = rec.values - eq
    F = linalg2.expm(A, h)
    r = dev[first + 1] - np.einsum("kij,kj->ki", F, dev[first])
    # consecutive pairs sharing a sample
    nxt = np.flatnonzero(np.isin(first + 1, first))
    j = np.searchsorted(first, first[nxt] + 1)
    if nxt.size >= 3:
        Finv = linalg2.inv(F[j])
        prod = np.einsum("kij,kj,kl->kil", Finv, r[j], r[nxt])
        Rm = -prod.mean(axis=0)
        Rm = _psd(0.5 * (Rm + Rm.T))
    else:
        Rm = np.zeros((2, 2))
    hbar = float(np.mean(h))
    S = np.einsum("ki,kj->kij", r, r) - Rm - F @ Rm @ np.swapaxes(F, 1, 2)
    W = S.sum(axis=0) * (hbar / h.sum())  # ratio of sums: stable for tiny steps
    W = 0.5 * (W + W.T)
    basis = [np.diag([1.0, 0.0]), np.diag([0.0, 1.0]), np.array([[0.0, 1.0], [1.0, 0.0]])]
    K = np.empty((3, 3))
    for col, E in enumerate(basis):
        C = _step_covariance(A, E, hbar)
        K[:, col] = [C[0, 0], C[1, 1], C[0, 1]]
    try:
        q = np.linalg.solve(K, [W[0, 0], W[1, 1], W[0, 1]])
        Q = _psd(np.array([[q[0], q[2]], [q[2], q[1]]]))
    except np.linalg.LinAlgError:
        Q = _psd(W / hbar)
    note = (
        "parametric noise by moments of the one-step prediction errors: "
        f"Q = {np.round(Q, 6).tolist()}, R = {np.round(Rm, 6).tolist()}"
    )
    return Q, Rm, note


def _step_covariance(A: np.ndarray, Q: np.ndarray, h: float) -> np.ndarray:
    """``int_0^h expm(A s) Q expm(A s)^T ds`` for any symmetric ``Q`` (Van Loan 1978)."""
    from scipy.linalg import expm

    M = np.zeros((4, 4))
    M[:2, :2] = -A
    M[:2, 2:] = Q
    M[2:, 2:] = A.T
    blk = expm(M * h)
    return blk[2:, 2:].T @ blk[:2, 2:]


def _psd(C: np.ndarray) -> np.ndarray:
    w, V = np.linalg.eigh(0.5 * (C + C.T))
    return (V * np.clip(w, 0.0, None)) @ V.T


# ==================================================================================
# the generators
# ==================================================================================
class _Plan:
    """Everything a scheme needs, fixed for one bootstrap run."""

    def __init__(self, rec: Recording, estimator: Estimator, estimate: Estimate) -> None:
        self.rec = rec
        self.est = estimator
        self.estimate = estimate
        self.eq = (
            np.asarray(estimate.equilibrium, dtype=float) if estimate.equilibrium_known else None
        )
        self.regression = bool(estimator.is_regression)
        self.failure_label = (
            "no real logarithm" if estimator.name in ("discrete", "instrumental") else "failed fit"
        )
        if self.regression:
            self.design = estimator.design(rec, self.eq)
            C, c = estimator.solve(self.design)
            self.theta_hat = _theta_of(C, c)[0]
            self.p = self.design.n_coef
            self.G = self.design.n_groups
        else:
            self.design = None
            self.theta_hat = np.concatenate(
                [np.asarray(estimate.matrix, float).reshape(4), np.asarray(estimate.offset, float)]
            )

    # -- coefficients <-> systems ------------------------------------------------------
    def systems(self, theta: np.ndarray) -> SystemBatch:
        theta = np.atleast_2d(theta)
        if self.regression:
            C, c = _split_theta(theta, self.p, self.G)
            return self.est.to_system(C, c, self.design)
        A = theta[:, :4].reshape(-1, 2, 2)
        b = theta[:, 4:6]
        ok = np.all(np.isfinite(theta), axis=1)
        return SystemBatch(matrix=A, offset=b, valid=ok)

    def stable_of(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        s = self.systems(theta)
        lam = linalg2.eigvals(np.where(s.valid[:, None, None], s.matrix, 0.0))
        return s.valid, s.valid & (lam.real[:, 0] < 0)

    # -- refits ------------------------------------------------------------------------
    def refit_values(self, values: np.ndarray) -> np.ndarray:
        """Coefficients of replicate values (B, n, 2).

        Floating-point warnings are silenced: a replicate simulated from an explosive
        model may overflow, and its fit then fails and is counted, never hidden.
        """
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            return self._refit_values(values)

    def _refit_values(self, values: np.ndarray) -> np.ndarray:
        if self.regression:
            d = self.est.design(self.rec, self.eq, values)
            C, c = self.est.solve(d)
            return _theta_of(C, c)
        s = self.est.fit_values(self.rec, values, self.eq)
        th = np.concatenate([s.matrix.reshape(-1, 4), s.offset], axis=1)
        return np.where(s.valid[:, None], th, np.nan)

    def refit_weights(self, w: np.ndarray) -> np.ndarray:
        """Coefficients of replicate row weights (B, m) on the point design."""
        d = self.design
        C, c = self.est.solve(d, w)
        return _theta_of(C, c)

    def refit_moments(self, mom: Moments) -> np.ndarray:
        """Coefficients of replicate normal equations (the solve of the point fit)."""
        C, c = solve_moments(mom)
        return _theta_of(C, c)


def _theta_of(C: np.ndarray, c: np.ndarray) -> np.ndarray:
    B = C.shape[0]
    return np.concatenate([C.reshape(B, -1), c.reshape(B, -1)], axis=1)


def _split_theta(theta: np.ndarray, p: int, G: int) -> tuple[np.ndarray, np.ndarray]:
    B = theta.shape[0]
    C = theta[:, : 2 * p].reshape(B, p, 2)
    c = theta[:, 2 * p :].reshape(B, G, 2)
    return C, c


#: ``fill(rows, shift, out)``: writes the innovations of design rows ``rows`` (T, a)
#: plus ``shift`` (2,) into ``out`` (2, T, a, replicates); see _Recursion.moments.
_Fill = Callable[[np.ndarray, np.ndarray, np.ndarray], None]

#: States (time steps x active segments x replicates) per time block of the
#: recursive regeneration: enough to amortise numpy's per-call cost, few enough for
#: a block to stay in the processor cache.
_BLOCK_STATES = 2**17

#: Most replicates per chunk of the recursive regeneration (its memory per replicate
#: does not grow with the record length).
_MOST_RECURSIVE = 16384


class _Recursion:
    """Recursive one-step regeneration of every segment, accumulated as moments.

    A replicate's one-step regression needs only sums over its rows (``sum z`` and
    ``sum y`` per intercept group, ``sum z z'``, ``sum z y'``), so the replicate
    series are never stored.  Every segment is regenerated from its first observed
    sample as deviations ``u = x - r`` from a fixed reference point ``r`` (the mean
    of the regressor rows when an intercept is fitted, the known equilibrium
    otherwise), ``u_{k+1} = F u_k + (F r + g - r) + e_k``, and the sums are
    accumulated block by block over time, vectorised over replicates and segments;
    :func:`~fitdyn.estimators.base.moments_from_sums` turns them into the normal
    equations the point fit solves.  Segments are sorted by length so that the
    active segments are a prefix, and a time block never runs past the end of an
    active segment.  A block's states are stored time-major, shape
    (T + 1, segments, 2, replicates).
    """

    def __init__(self, plan: _Plan) -> None:
        d = plan.design
        rec = plan.rec
        self.first = d.info["first"]
        self.m = int(self.first.size)
        self.eq = plan.eq
        self.base = np.asarray(rec.values, dtype=float)
        if self.eq is not None:
            self.base = self.base - self.eq
        bounds = rec.segment_bounds()
        starts = np.array([s for s, _ in bounds], dtype=np.intp)
        lens = np.array([e - s for s, e in bounds], dtype=np.intp)
        keep = lens >= 2  # a lone sample has no pair
        order = np.argsort(-lens[keep], kind="stable")
        self.starts = starts[keep][order]
        self.steps = lens[keep][order] - 1  # pairs (design rows) per segment
        row_of = np.full(rec.n_samples, -1, dtype=np.intp)
        row_of[self.first] = np.arange(self.m)
        self.row_of = row_of
        S = self.starts.size
        self.G = d.n_groups
        if self.G:
            groups = np.asarray(d.groups)
            seg_group = groups[row_of[self.starts]]
            same = np.diff(np.asarray(d.row_segment)) == 0  # rows are consecutive
            if np.any(np.diff(groups)[same] != 0):
                raise EstimationError(
                    "internal: the recursive regeneration needs one intercept group per segment"
                )
            self.onehot = np.zeros((self.G, S))
            self.onehot[seg_group, np.arange(S)] = 1.0
            self.rows = np.bincount(groups, minlength=self.G)
            self.origin = self.base[self.first].mean(axis=0)
        else:
            self.rows = np.array([self.m])
            self.origin = np.zeros(2)

    def bytes_per_replicate(self) -> int:
        """Memory of one replicate in a chunk (block buffers at one step, sums)."""
        return 8 * (19 * int(self.starts.size) + 48)

    def residuals(self, F: np.ndarray, g: np.ndarray, dof_params: int) -> np.ndarray:
        """Centred one-step residuals (m, 2) rescaled for the fitted coefficients."""
        z = self.base[self.first]
        y = self.base[self.first + 1]
        e = y - z @ F.T - g
        e = e - e.mean(axis=0)
        return e * np.sqrt(self.m / max(self.m - dof_params, 1))

    def _blocks(self, size: int) -> list[tuple[int, int, int]]:
        """``(j0, T, active)``: time blocks of ``T`` steps from step ``j0``."""
        out = []
        j = 0
        active = self.starts.size
        while True:
            while active and self.steps[active - 1] <= j:
                active -= 1
            if not active:
                return out
            T = max(1, _BLOCK_STATES // (active * size))
            T = int(min(T, self.steps[active - 1] - j))
            out.append((j, T, active))
            j += T

    def moments(self, F: np.ndarray, g: np.ndarray, size: int, fill: _Fill) -> Moments:
        """Normal equations of ``size`` regenerated replicates.

        Parameters
        ----------
        F : ndarray, shape (2, 2)
            One-step matrix of the model.
        g : ndarray, shape (2,)
            One-step constant (zero with a known equilibrium).
        size : int
            Number of replicates.
        fill : callable
            ``fill(rows, shift, out)`` writes the innovations of the design rows
            ``rows`` (int array (T, active)) plus ``shift`` (2,) into ``out``,
            shape (2, T, active, size).

        Returns
        -------
        Moments
        """
        F = np.ascontiguousarray(F, dtype=float)
        r = self.origin
        shift = F @ r + np.asarray(g, dtype=float) - r
        S = int(self.starts.size)
        blocks = self._blocks(size)
        cap_u = max((T + 1) * a for _, T, a in blocks) * 2 * size
        cap_e = max(T * a for _, T, a in blocks) * 2 * size
        ubuf = np.empty(cap_u)
        ebuf = np.empty(cap_e)
        cur = np.empty((S, 2, size))
        cur[:] = (self.base[self.starts] - r)[:, :, None]
        szz = np.zeros((3, size))  # sum z z': (0, 0), (0, 1), (1, 1)
        szy = np.zeros((4, size))  # sum z y': (0, 0), (0, 1), (1, 0), (1, 1)
        sz = np.zeros((S, 2, size))
        sy = np.zeros((S, 2, size))
        steps = np.arange(max(T for _, T, _ in blocks))[:, None]
        for j0, T, a in blocks:
            U = ubuf[: (T + 1) * a * 2 * size].reshape(T + 1, a, 2, size)
            E = ebuf[: T * a * 2 * size].reshape(2, T, a, size)
            fill(self.row_of[self.starts[:a] + j0 + steps[:T]], shift, E)
            Et = E.transpose(1, 2, 0, 3)  # (T, a, 2, size)
            U[0] = cur[:a]
            for t in range(T):
                np.matmul(F, U[t], out=U[t + 1])
                U[t + 1] += Et[t]
            z0, z1 = U[:T, :, 0], U[:T, :, 1]
            y0, y1 = U[1:, :, 0], U[1:, :, 1]
            szz[0] += np.einsum("tsb,tsb->b", z0, z0)
            szz[1] += np.einsum("tsb,tsb->b", z0, z1)
            szz[2] += np.einsum("tsb,tsb->b", z1, z1)
            szy[0] += np.einsum("tsb,tsb->b", z0, y0)
            szy[1] += np.einsum("tsb,tsb->b", z0, y1)
            szy[2] += np.einsum("tsb,tsb->b", z1, y0)
            szy[3] += np.einsum("tsb,tsb->b", z1, y1)
            blk = U[:T].sum(axis=0)
            sz[:a] += blk
            sy[:a] += blk
            sy[:a] += U[T] - U[0]
            cur[:a] = U[T]
        Szz = np.stack([szz[0], szz[1], szz[1], szz[2]], axis=-1).reshape(size, 2, 2)
        Szy = np.moveaxis(szy, 0, -1).reshape(size, 2, 2)
        if not self.G:
            return moments_from_sums(self.rows, Szz, Szy)
        sz_g = np.einsum("gs,sib->bgi", self.onehot, sz)
        sy_g = np.einsum("gs,sib->bgi", self.onehot, sy)
        return moments_from_sums(self.rows, Szz, Szy, sz_g, sy_g, r, r)


def _resampled_innovations(rng: np.random.Generator, e: np.ndarray) -> _Fill:
    """``fill`` for :meth:`_Recursion.moments`: rows of ``e`` drawn with replacement."""
    cols = [np.ascontiguousarray(e[:, i]) for i in range(2)]

    def fill(rows: np.ndarray, shift: np.ndarray, out: np.ndarray) -> None:
        idx = rng.integers(0, e.shape[0], size=out.shape[1:])
        for i in range(2):  # mode="clip" takes straight into ``out`` (no buffer)
            np.take(cols[i] + shift[i], idx, out=out[i], mode="clip")

    return fill


def _gaussian_innovations(rng: np.random.Generator, root: np.ndarray) -> _Fill:
    """``fill`` for :meth:`_Recursion.moments`: Gaussian, covariance ``root root'``."""

    def fill(rows: np.ndarray, shift: np.ndarray, out: np.ndarray) -> None:
        z = rng.standard_normal((2, out[0].size))
        out[:] = (root @ z + shift[:, None]).reshape(out.shape)

    return fill


def _segments_rows(row_segment: np.ndarray) -> list[tuple[int, int]]:
    seg = np.asarray(row_segment)
    change = np.flatnonzero(np.diff(seg) != 0) + 1
    starts = np.concatenate([[0], change])
    stops = np.concatenate([change, [seg.size]])
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


def _block_weights(
    rng: np.random.Generator, size: int, spans: list[tuple[int, int]], m: int, length: int
) -> np.ndarray:
    """Moving-block multiplicities (size, m); blocks stay inside each row span."""
    w = np.zeros((size, m))
    flat = w.reshape(-1)
    base = (np.arange(size) * m)[:, None]
    for s, e in spans:
        ms = e - s
        ls = max(1, min(length, ms))
        nb = -(-ms // ls)
        st = rng.integers(0, ms - ls + 1, size=(size, nb))
        idx = (st[:, :, None] + np.arange(ls)).reshape(size, -1)[:, :ms] + s
        flat += np.bincount((idx + base).ravel(), minlength=size * m)
    return w


class _Runner:
    """One scheme on one plan: coefficient replicates in chunks."""

    def __init__(
        self,
        plan: _Plan,
        scheme: str,
        block: int | None,
        notes: list[str],
    ) -> None:
        self.plan = plan
        self.scheme = scheme
        self.notes = notes
        rec = plan.rec
        est = plan.est
        self.block = None
        #: (memory per replicate, most replicates) of one chunk, see _chunk_size
        self.chunk_limits: tuple[int | None, int] = (None, 4096)
        if scheme == "residual":
            if est.name != "discrete":
                raise EstimationError(
                    "the 'residual' scheme regenerates one-step fits and needs the "
                    "'discrete' estimator; use scheme 'blocks' or 'parametric'"
                )
            self.rec_gen = _Recursion(plan)
            self.chunk_limits = (self.rec_gen.bytes_per_replicate(), _MOST_RECURSIVE)
        elif scheme == "blocks":
            if not plan.regression:
                raise EstimationError(
                    f"the 'blocks' scheme resamples regression rows, which the "
                    f"'{est.name}' estimator has none of; use 'parametric' or 'cases'"
                )
            d = plan.design
            self.spans = _segments_rows(d.row_segment)
            resid = np.asarray(plan.estimate.residuals, dtype=float)
            if block is None:
                block = (
                    block_length(resid, d.row_segment)
                    if resid.shape[0] == d.n_rows
                    else max(1, round(d.n_rows ** (1 / 3)))
                )
            self.block = int(block)
            notes.append(f"moving blocks of {self.block} regression rows")
        elif scheme == "cases":
            if rec.n_trajectories < MIN_CASES:
                raise EstimationError(
                    f"the 'cases' scheme resamples whole trajectories and needs at least "
                    f"{MIN_CASES}, the recording has {rec.n_trajectories}; use 'auto'"
                )
            notes.append(f"whole trajectories resampled ({rec.n_trajectories} trajectories)")
        elif scheme == "parametric":
            if est.name == "discrete":
                self.rec_gen = _Recursion(plan)
                self.chunk_limits = (self.rec_gen.bytes_per_replicate(), _MOST_RECURSIVE)
                notes.append(
                    "parametric: Gaussian one-step innovations with the residual covariance "
                    "(process and measurement noise lumped)"
                )
            elif not plan.regression and _model_noise(plan.estimate) is not None:
                Q, R = _model_noise(plan.estimate)  # type: ignore[misc]
                notes.append(
                    "parametric: process noise Q = "
                    f"{np.round(Q, 6).tolist()} and measurement noise R = "
                    f"{np.round(R, 6).tolist()} of the fitted model"
                )
            elif not plan.regression:
                notes.append(
                    "parametric: measurement noise with the residual covariance, no "
                    "process noise (the output-error model)"
                )
            else:
                self.noise: tuple[np.ndarray, np.ndarray] | None = None
        else:
            raise EstimationError(f"unknown scheme '{scheme}'; choose one of {', '.join(SCHEMES)}")

    # -- one chunk ---------------------------------------------------------------------
    def draw(self, rng: np.random.Generator, size: int, theta_model: np.ndarray) -> np.ndarray:
        """Coefficient replicates (size, k) generated from the model ``theta_model``."""
        plan = self.plan
        if self.scheme == "blocks":
            w = _block_weights(rng, size, self.spans, plan.design.n_rows, self.block)
            return plan.refit_weights(w)
        if self.scheme == "cases":
            return self._cases(rng, size)
        if self.scheme == "residual" or (
            self.scheme == "parametric" and plan.est.name == "discrete"
        ):
            C, c = _split_theta(theta_model[None], plan.p, plan.G)
            F = C[0].T
            g = c[0, 0] if plan.G else np.zeros(2)
            gen = self.rec_gen
            if self.scheme == "residual":
                fill = _resampled_innovations(rng, gen.residuals(F, g, plan.p + plan.G))
            else:
                cov = np.asarray(plan.estimate.residual_cov, dtype=float)
                fill = _gaussian_innovations(rng, _sqrt_psd(cov))
            return plan.refit_moments(gen.moments(F, g, size, fill))
        return plan.refit_values(self._simulate(rng, size, theta_model))

    def _simulate(self, rng: np.random.Generator, size: int, theta_model: np.ndarray) -> np.ndarray:
        from fitdyn.simulate import simulate

        plan = self.plan
        rec = plan.rec
        sysb = plan.systems(theta_model[None])
        if not sysb.valid[0]:
            raise EstimationError("the model to simulate from is not a real system")
        A = sysb.matrix[0]
        b = sysb.offset[0]
        eq = plan.eq if plan.eq is not None else _min_norm_equilibrium(A, b)
        if plan.regression:
            if self.noise is None:
                Q, R, note = noise_model(rec, A, b)
                self.noise = (Q, R)
                self.notes.append(note)
            Q, R = self.noise
        elif _model_noise(plan.estimate) is not None:
            Q, R = _model_noise(plan.estimate)  # type: ignore[misc]
        else:
            Q = None
            R = np.asarray(plan.estimate.residual_cov, dtype=float)
        times = [t for _, t, _ in rec.trajectories()]
        x0 = _initial_states(plan, rec)
        try:
            batch = simulate(
                A,
                eq,
                x0,
                times,
                process_noise=None if Q is None or not np.any(Q) else Q,
                measurement_cov=R if np.any(R) else None,
                seed=rng,
                replicates=size,
                overflow="nan",
            )
        except InputError as exc:
            # a model too explosive to simulate over these steps (e.g. a bias-corrected
            # model far from the point estimate): every replicate fails, and is counted
            note = f"the model to simulate from cannot be simulated on these times ({exc})"
            if note not in self.notes:
                self.notes.append(note)
            return np.full((size, rec.n_samples, 2), np.nan)
        lost = int(np.sum(np.isnan(batch.values[:, 0, 0])))
        if lost:
            note = (
                "replicates simulated from the model overflowed (a model too explosive "
                "for the recording's span); they count as failed"
            )
            if note not in self.notes:
                self.notes.append(note)
        return batch.values

    def _cases(self, rng: np.random.Generator, size: int) -> np.ndarray:
        plan = self.plan
        R = plan.rec.n_trajectories
        counts = rng.multinomial(R, np.full(R, 1.0 / R), size=size).astype(float)
        if plan.regression:
            w = counts[:, plan.design.row_trajectory]
            return plan.refit_weights(w)
        out = np.full((size, 6), np.nan)
        for i in range(size):  # nonlinear fits: one fit per replicate is inherent
            rec_b = _resampled_recording(plan.rec, counts[i].astype(int))
            try:
                e = plan.est.fit(rec_b, plan.eq)
                out[i] = np.concatenate([np.asarray(e.matrix).reshape(4), e.offset])
            except FitdynError:
                pass
        return out


def _model_noise(estimate: Estimate) -> tuple[np.ndarray, np.ndarray] | None:
    """``(Q, R)`` of estimators that fit both noises themselves (``extra`` keys
    ``process_noise`` and ``measurement_cov``), else None."""
    extra = estimate.extra or {}
    if "process_noise" not in extra:
        return None
    Q = np.asarray(extra["process_noise"], dtype=float).reshape(2, 2)
    R = extra.get("measurement_cov")
    R = np.zeros((2, 2)) if R is None else np.asarray(R, dtype=float).reshape(2, 2)
    return Q, R


def _initial_states(plan: _Plan, rec: Recording) -> np.ndarray:
    x0 = plan.estimate.extra.get("initial_states") if plan.estimate.extra else None
    if x0 is not None:
        x0 = np.asarray(x0, dtype=float)
        if x0.shape == (rec.n_trajectories, 2):
            return x0
    return np.array([v[0] for _, _, v in rec.trajectories()])


def _resampled_recording(rec: Recording, counts: np.ndarray) -> Recording:
    parts = []
    for k, cnt in enumerate(counts):
        parts.extend([k] * int(cnt))
    idx = np.concatenate([np.flatnonzero(rec.trajectory == k) for k in parts])
    new_traj = np.concatenate(
        [np.full(int(np.sum(rec.trajectory == k)), j) for j, k in enumerate(parts)]
    )
    seg_base = np.concatenate(
        [rec.segment[rec.trajectory == k] - rec.segment[rec.trajectory == k].min() for k in parts]
    )
    offs = np.concatenate(
        [
            np.full(int(np.sum(rec.trajectory == k)), j * (int(rec.segment.max()) + 1))
            for j, k in enumerate(parts)
        ]
    )
    from fitdyn.recording import Recording as _R

    return _R(
        times=rec.times[idx],
        values=rec.values[idx],
        trajectory=new_traj,
        segment=seg_base + offs,
        outlier=rec.outlier[idx],
        source_rows=rec.source_rows[idx],
        channels=rec.channels,
        units=rec.units,
        time_unit=rec.time_unit,
        trajectory_names=tuple(f"{rec.trajectory_names[k]}#{j}" for j, k in enumerate(parts)),
        log=rec.log,
        source=rec.source,
        time_origin=rec.time_origin,
        jitter_tolerance=rec.jitter_tolerance,
    )


def _sqrt_psd(C: np.ndarray) -> np.ndarray:
    w, V = np.linalg.eigh(0.5 * (C + C.T))
    return V * np.sqrt(np.clip(w, 0.0, None))[None, :]


def _chunk_size(
    rec: Recording, B: int, chunk: int | None, per: int | None = None, most: int = 4096
) -> int:
    """Replicates per chunk: ``chunk`` if given, else from the memory budget.

    ``per`` is the memory of one replicate (default: about 8 arrays of (n, 2)
    floats, for the schemes that materialise replicate series or weights).
    """
    if chunk is not None:
        if int(chunk) < 1:
            raise EstimationError(f"chunk must be a positive integer, got {chunk!r}")
        return int(chunk)
    if per is None:
        per = max(rec.n_samples, 1) * 2 * 8 * 8
    return int(max(16, min(B, most, CHUNK_BYTES // per)))


def _progress(total: int, quiet: bool, desc: str):
    disable = quiet or not (hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    if disable:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="rep", leave=False, file=sys.stderr)


def _generate(
    runner: _Runner,
    theta_model: np.ndarray,
    B: int,
    rng: np.random.Generator,
    size: int,
    bar: Any,
) -> np.ndarray:
    out = []
    done = 0
    while done < B:
        n = min(size, B - done)
        out.append(runner.draw(rng, n, theta_model))
        done += n
        if bar is not None:
            bar.update(n)
    return np.concatenate(out, axis=0)


def _jackknife(plan: _Plan, groups: int = 50) -> tuple[np.ndarray, np.ndarray] | None:
    """Delete-a-group jackknife systems (for the BCa acceleration)."""
    if plan.regression:
        m = plan.design.n_rows
        G = int(min(groups, m))
        lab = np.arange(m) * G // m
        w = np.ones((G, m))
        w[lab, np.arange(m)] = 0.0
        s = plan.systems(plan.refit_weights(w))
        return s.matrix, s.offset
    rec = plan.rec
    if rec.n_trajectories >= MIN_CASES:
        masks = [rec.trajectory != k for k in range(rec.n_trajectories)]
    else:
        G = int(min(20, rec.n_samples))
        lab = np.arange(rec.n_samples) * G // rec.n_samples
        masks = [lab != k for k in range(G)]
    mats, offs = [], []
    for mk in masks:
        try:
            e = plan.est.fit(rec.select(mk), plan.eq)
            mats.append(e.matrix)
            offs.append(e.offset)
        except FitdynError:
            mats.append(np.full((2, 2), np.nan))
            offs.append(np.full(2, np.nan))
    return np.array(mats), np.array(offs)


def _seeds(seed: Any, k: int) -> list[np.random.Generator]:
    if isinstance(seed, np.random.Generator):
        return [np.random.default_rng(s) for s in seed.bit_generator.seed_seq.spawn(k)]
    ss = np.random.SeedSequence(seed)
    return [np.random.default_rng(s) for s in ss.spawn(k)]


# ==================================================================================
# entry points
# ==================================================================================
def default_bias_correction(scheme: str, estimator: Estimator) -> bool:
    """Whether bias correction is on by default.

    On for the one-step fits (``discrete``, ``instrumental``) with a regenerating
    scheme (``residual``, ``parametric``): benchmarks/coverage.py shows that
    without it the intervals of short or persistent records miss the truth on the
    slow side (discrete: coverage 0.77-0.85 instead of 0.95, 0.93-0.96 with it;
    instrumental under process plus measurement noise: about 0.85 without,
    0.93-0.95 with it), and for the Kalman-filter fit's parametric scheme
    (0.78-0.85 without, 0.90-0.93 with it in a 60-dataset check), and for the
    prediction-error fit on irregular steps (0.80-0.83 without, 0.93-0.95 with
    it), and for the nonlinear instrumental-variable fit on irregular steps with
    both noises (0.89-0.95 without, 0.93 with it).  Off elsewhere: the row
    schemes cannot move the data-generating process, and for the other
    estimators the benchmark shows no gain worth the doubled work.
    """
    if scheme == "residual":
        return estimator.name == "discrete"
    return scheme == "parametric" and estimator.name in (
        "discrete",
        "instrumental",
        "kalman",
        "prediction",
        "nonlinear-iv",
    )


def bootstrap(
    rec: Recording,
    estimator: Estimator,
    estimate: Estimate,
    replicates: int = 1000,
    confidence: float = 0.95,
    seed: Any = None,
    scheme: str = "auto",
    method: str = "percentile",
    bias_correction: bool | None = None,
    margin: float | None = None,
    quiet: bool = False,
    chunk: int | None = None,
    block: int | None = None,
    bias_iterations: int = 1,
) -> Uncertainty:
    """Bootstrap uncertainty of a fitted system.

    Parameters
    ----------
    rec : Recording
        The recording the point estimate was fitted to.
    estimator : Estimator
        The estimator instance used for the point fit.
    estimate : Estimate
        Its result (a known equilibrium, when it has one, is kept in every replicate).
    replicates : int
        Number of replicates ``B``.
    confidence : float
        Confidence level of the intervals (default 0.95).
    seed : int, SeedSequence, Generator or None
        Seed of the random numbers; the same seed (and the same arguments) gives
        identical numbers.
    scheme : {"auto", "residual", "blocks", "parametric", "cases"}
        Resampling scheme (module notes; ``auto`` see :func:`choose_scheme`).
    method : {"percentile", "bca"}
        Interval method; BCa (Efron 1987) takes its acceleration from a
        delete-a-group jackknife (by row weights for the regression estimators).
    bias_correction : bool or None
        Bootstrap-after-bootstrap bias correction; ``None`` takes the default of
        :func:`default_bias_correction` (on for the discrete fit's ``residual`` and
        ``parametric`` schemes, off otherwise).  It doubles the work.
    margin : float, optional
        Practical-equivalence margin giving the boundary classes probabilities
        (:func:`margin_codes`), e.g. 0.01.
    quiet : bool
        No progress bar (it is also silent when stderr is not a terminal).
    chunk : int, optional
        Replicates per chunk (default: from a memory budget of about 160 MB and the
        recording's size; the chunking does not depend on the machine, so results
        are reproducible everywhere).
    block : int, optional
        Block length of the ``blocks`` scheme (default: chosen from the residuals).
    bias_iterations : int
        Rounds of the bias estimate for the regenerating schemes (default 1, Kilian's
        procedure; more rounds re-estimate the bias at the corrected model, with
        common random numbers; the coverage benchmark shows no gain from 2 or 3).

    Returns
    -------
    Uncertainty
    """
    B = int(replicates)
    if B < 2 or B != replicates:
        raise EstimationError(f"replicates must be an integer of at least 2, got {replicates!r}")
    if scheme not in SCHEMES:
        raise EstimationError(f"unknown scheme '{scheme}'; choose one of {', '.join(SCHEMES)}")
    if method not in ("percentile", "bca"):
        raise EstimationError(f"method must be 'percentile' or 'bca', got {method!r}")
    notes: list[str] = []
    warns: list[str] = []
    if scheme == "auto":
        scheme, why = choose_scheme(estimator, rec)
        notes.append(f"scheme chosen automatically: {why}")
    plan = _Plan(rec, estimator, estimate)
    runner = _Runner(plan, scheme, block, notes)
    bc = (
        default_bias_correction(scheme, estimator)
        if bias_correction is None
        else bool(bias_correction)
    )
    size = _chunk_size(rec, B, chunk, *runner.chunk_limits)
    rng1, rng2, _ = _seeds(seed, 3)
    regenerating = scheme in ("residual", "parametric")
    iters = max(1, int(bias_iterations)) if regenerating else 1
    bar = _progress((iters + 1) * B if bc else B, quiet, f"bootstrap ({scheme})")
    corrected = False
    theta_hat = plan.theta_hat
    theta_point = theta_hat
    try:
        state = rng1.bit_generator.state
        th1 = _generate(runner, theta_hat, B, rng1, size, bar)
        th = th1
        if bc:
            from fitdyn.estimators.discrete import bias_correction as _kilian

            model, draws = theta_hat, th1
            for it in range(iters):
                if it:
                    # common random numbers: every iteration reuses the first stream
                    rng1.bit_generator.state = state
                    draws = _generate(runner, model, B, rng1, size, bar)
                res = _kilian(theta_hat, draws, plan.stable_of, model)
                if not res.usable or res.crossed:
                    break
                model = res.theta
            if res.warning is not None:
                warns.append(res.warning)
            if not res.usable or (res.crossed and _CROSSED_POLICY == "drop"):
                if bar is not None:
                    bar.update(B * (iters - it))
            else:
                if res.crossed:
                    model = res.theta
                corrected = True
                theta_point = theta_hat if res.crossed else model
                bias = theta_hat - model
                if regenerating:
                    th2 = _generate(runner, model, B, rng2, size, bar)
                else:  # row schemes: the data-generating process cannot be moved
                    if bar is not None:
                        bar.update(B)
                    th2 = th1
                th = th2 - bias
                how = "bootstrap after bootstrap (Kilian 1998)"
                if iters > 1:
                    how += f", bias evaluated at the corrected model ({iters} iterations)"
                moved = plan.systems(np.stack([model, theta_hat])).matrix
                notes.append(
                    f"bias-corrected by {how}; the correction changes A by "
                    f"{np.round(moved[0] - moved[1], 6).tolist()}"
                    + (" (not applied to the point estimate)" if res.crossed else "")
                )
    finally:
        if bar is not None:
            bar.close()
    sysb = plan.systems(th)
    point = plan.systems(theta_point[None])
    # the BCa acceleration is invariant to the constant bias shift: no correction
    jack = _jackknife(plan) if method == "bca" else None
    return summarize(
        sysb.matrix,
        sysb.offset,
        sysb.valid,
        point.matrix[0],
        point.offset[0],
        confidence=confidence,
        method=method,
        jackknife=jack,
        margin=margin,
        scheme=scheme,
        seed=seed,
        bias_corrected=corrected,
        failure_label=plan.failure_label,
        warnings=tuple(warns),
        notes=tuple(notes),
    )


def asymptotic(
    rec: Recording,
    estimator: Estimator,
    estimate: Estimate,
    confidence: float = 0.95,
    draws: int = 4000,
    seed: Any = None,
    margin: float | None = None,
) -> Uncertainty:
    """Fast asymptotic uncertainty from the estimator's covariance (delta method).

    See :func:`fitdyn.asymptotic.asymptotic`.
    """
    from fitdyn.asymptotic import asymptotic as _asym

    return _asym(rec, estimator, estimate, confidence=confidence, draws=draws, seed=seed,
                 margin=margin)  # fmt: skip
