"""Planning the next experiment by simulation: how long, how often, how many runs.

From a fitted result (a :class:`~fitdyn.analysis.Fit`, or the JSON file that
``fitdyn fit --json`` writes) or from a given matrix with noise levels, :func:`plan`
simulates candidate designs -- sampling step, duration of each run, number of runs,
size of the initial displacement -- with :func:`fitdyn.simulate` (exact
discretisation), fits every simulated experiment the way ``fit`` would, and reports
the cheapest design whose estimated probability of reaching a stated target is at
least the stated probability.

Targets (``confidence`` ``c``, 0.95 by default):

``"stability"``
    the stability verdict is decided: ``P(stable) >= c`` or ``P(stable) <= 1 - c``;
``"class"``
    the class probability of the true class is at least ``c``;
``"width"``
    the ``c`` interval of the largest real part of the eigenvalues is at most ``W``
    wide (absolute, in 1/time units, or relative to ``|Re lambda_max|`` of the
    point estimate when given as ``"20%"``).

How each simulated experiment is fitted (``intervals``):

``"auto"``
    ``"bootstrap"`` where ``auto`` chose a regression estimator (closest to the full
    default: benchmarks/plan_speed.py, but a loop over the experiments that took
    90-110 s on two demo files), ``"spread"`` where it chose an iterative one
    (output-error, Kalman, prediction-error, nonlinear instrumental fits), whose
    bootstrap costs a full refit per replicate.
``"spread"`` (default)
    ``auto`` picks the estimator once per design family (step x runs x amplitude) on
    one simulated experiment; that estimator then refits every simulated experiment
    of the family in one batched call (:meth:`Estimator.fit_values`).  Each
    experiment's uncertainty is the normal approximation centred on its own
    estimate with the covariance of the design's simulated estimates (the spread a
    calibrated bootstrap reports); probabilities and the interval come from
    ``draws`` draws of it.  Fast, and no Python loop over experiments.
``"bootstrap"``
    the estimator chosen per family refits each experiment and
    :func:`fitdyn.bootstrap.bootstrap` runs with ``replicates`` replicates (100 by
    default, fewer than the 1000 of a full fit).
``"full"``
    ``fitdyn.fit(method="auto", bootstrap=1000)`` on every experiment: the
    reference the others are measured against (benchmarks/plan_speed.py).

Every probability carries its Monte Carlo standard error ``sqrt(p (1 - p) / n)``
(binomial, ``n`` simulated experiments; common practice).  The chosen design is
re-checked by simulating from systems drawn from the fit's uncertainty (its
bootstrap replicate matrices), not only from its point estimate: the model is
itself an estimate, and a plan that only works for the point estimate is fragile.

Simulated experiments show what the fitted linear model does, not what the real
system will do; a plan is a statistical estimate about a linearisation.
"""

from __future__ import annotations

import json
import math
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from fitdyn import classify, linalg2
from fitdyn.errors import FitdynError, InputError

__all__ = ["plan", "Plan", "Design", "DesignResult", "Basis", "mc_se", "TARGETS", "INTERVALS"]

TARGETS = ("stability", "class", "width")
INTERVALS = ("auto", "spread", "bootstrap", "full")
COSTS = ("samples", "time")

#: Default grid, as factors of the current design.
STEP_FACTORS = (2.0, 1.0, 0.5)
DURATION_FACTORS = (0.5, 1.0, 2.0, 4.0)
RUN_FACTORS = (1, 2)
AMPLITUDES = (1.0, 2.0)

#: Extra simulated experiments whose estimates give a regression's spread covariance.
COV_SIMULATIONS = 200

#: Replicate count of a full bootstrap (fitdyn.bootstrap's default).
FULL_REPLICATES = 1000

CAUTION = (
    "A plan is a statistical estimate about a linear model fitted near one equilibrium; "
    "simulated experiments show what that model does, not what the real system will do. "
    "Decisions that affect safety, health or compliance defer to local codes and "
    "licensed practice."
)


def mc_se(p: Any, n: Any) -> Any:
    """Monte Carlo standard error of a proportion: ``sqrt(p (1 - p) / n)``.

    The binomial standard error of an estimated probability from ``n`` independent
    simulated experiments (common practice, no source).  NaN where ``n == 0``.
    """
    p = np.asarray(p, dtype=float)
    n = np.asarray(n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(
            n > 0, np.sqrt(np.clip(p * (1 - p), 0, None) / np.where(n > 0, n, 1)), np.nan
        )
    return float(out) if out.ndim == 0 else out


# ----------------------------------------------------------------------------------
# designs and the starting point
# ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class Design:
    """One candidate experiment.

    Attributes
    ----------
    step : float
        Sampling step (uniform).
    duration : float
        Length of each run.
    runs : int
        Number of runs (trajectories).
    amplitude : float
        Initial displacement from the equilibrium, as a multiple of the current one.
    """

    step: float
    duration: float
    runs: int
    amplitude: float

    @property
    def samples_per_run(self) -> int:
        """Samples in each run: ``floor(duration / step) + 1``."""
        return int(math.floor(self.duration / self.step + 1e-9)) + 1

    @property
    def total_samples(self) -> int:
        """Samples over all runs."""
        return self.samples_per_run * self.runs

    def cost(self, kind: str = "samples") -> float:
        """``"samples"``: total samples; ``"time"``: duration x runs."""
        if kind == "samples":
            return float(self.total_samples)
        return float(self.duration * self.runs)

    @property
    def family(self) -> tuple[float, int, float]:
        """(step, runs, amplitude): the designs that differ only in duration."""
        return (self.step, self.runs, self.amplitude)

    def times(self) -> np.ndarray:
        """Sample times of one run."""
        return np.arange(self.samples_per_run) * self.step

    def to_dict(self) -> dict[str, Any]:
        """Plain numbers."""
        return {
            "step": self.step,
            "duration": self.duration,
            "runs": self.runs,
            "amplitude": self.amplitude,
            "samples_per_run": self.samples_per_run,
            "total_samples": self.total_samples,
        }


@dataclass(frozen=True)
class Basis:
    """What a plan starts from: the model, its noise, its uncertainty, the current design.

    Attributes
    ----------
    matrix : ndarray (2, 2)
        System matrix used to simulate (the point estimate).
    equilibrium : ndarray (2,)
    process_noise : ndarray (2, 2)
        Diffusion covariance rate Q.
    measurement_cov : ndarray (2, 2)
        Measurement covariance R.
    deviations : ndarray (R0, 2)
        Initial displacement of each current run from the equilibrium.
    step, duration : float
        Current median sampling step and median run length.
    runs : int
        Current number of runs.
    method : str or None
        The fit's estimator (None for a given matrix).
    equilibrium_known : bool
        Whether the fit was told the equilibrium (the simulated fits are too).
    systems : ndarray (K, 2, 2) or None
        Systems drawn from the fit's uncertainty (its valid bootstrap replicates).
    systems_from : str
        Where ``systems`` come from.
    current : dict or None
        The current data's uncertainty: ``p_stable``, ``class_probabilities``,
        ``label``, ``max_real_part`` interval, ``confidence``.
    source : str
    time_unit : str or None
    notes : tuple of str
    """

    matrix: np.ndarray
    equilibrium: np.ndarray
    process_noise: np.ndarray
    measurement_cov: np.ndarray
    deviations: np.ndarray
    step: float
    duration: float
    runs: int
    method: str | None = None
    equilibrium_known: bool = False
    systems: np.ndarray | None = None
    systems_from: str = "none"
    current: dict[str, Any] | None = None
    source: str = "given matrix"
    time_unit: str | None = None
    notes: tuple[str, ...] = ()

    def initial_states(self, runs: int, amplitude: float) -> np.ndarray:
        """Initial states of ``runs`` runs.

        Run ``k`` starts from the current run ``k mod R0``'s displacement times
        ``amplitude``; every further cycle through the current runs flips the sign of
        the second channel, so extra runs start from new directions.
        """
        R0 = self.deviations.shape[0]
        k = np.arange(runs)
        d = self.deviations[k % R0].copy()
        flip = np.where((k // R0) % 2 == 1, -1.0, 1.0)
        d[:, 1] *= flip
        return self.equilibrium + amplitude * d

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description."""
        return {
            "source": self.source,
            "method": self.method,
            "matrix": self.matrix.tolist(),
            "equilibrium": self.equilibrium.tolist(),
            "process_noise": self.process_noise.tolist(),
            "measurement_cov": self.measurement_cov.tolist(),
            "deviations": self.deviations.tolist(),
            "step": self.step,
            "duration": self.duration,
            "runs": self.runs,
            "time_unit": self.time_unit,
            "systems_drawn": 0 if self.systems is None else int(self.systems.shape[0]),
            "systems_from": self.systems_from,
            "current": self.current,
            "notes": list(self.notes),
        }


def _current_of(unc: Any, label: str) -> dict[str, Any]:
    iv = np.asarray(unc.intervals["max_real_part"], dtype=float)
    return {
        "p_stable": float(unc.p_stable),
        "class_probabilities": {k: float(v) for k, v in unc.class_probabilities.items()},
        "label": label,
        "max_real_part": [float(iv[0]), float(iv[1])],
        "confidence": float(unc.confidence),
        "replicates": int(unc.replicates),
        "scheme": unc.scheme,
    }


def basis_from_fit(
    fit: Any,
    *,
    process_noise: Any = None,
    measurement_noise: Any = None,
    seed: Any = None,
    replicates: int = FULL_REPLICATES,
    quiet: bool = True,
) -> Basis:
    """The starting point of a plan from a :class:`~fitdyn.analysis.Fit`.

    The noise is the estimator's own (Kalman-filter and instrumental fits estimate
    it) or else :func:`fitdyn.bootstrap.noise_model` (moments of the one-step
    errors); ``process_noise`` (Q) and ``measurement_noise`` (standard deviations)
    override it.  A fit without uncertainty gets the default bootstrap
    (``replicates`` replicates, seeded from ``seed``), which gives both the current
    data's verdict and the systems the plan is re-checked with.
    """
    from fitdyn import bootstrap as boot
    from fitdyn.simulate import _covariance, _measurement

    rec = fit.recording
    notes: list[str] = []
    A = np.asarray(fit.matrix, dtype=float)
    b = np.asarray(fit.offset, dtype=float)
    eq = fit.equilibrium
    if eq is None:
        eq = boot._min_norm_equilibrium(A, b)
        notes.append("A is singular: simulated about the minimum-norm equilibrium")
    eq = np.asarray(eq, dtype=float)
    own = boot._model_noise(fit.estimate)
    if own is not None:
        Q, R = own
        notes.append(f"noise from the '{fit.method}' fit itself")
    else:
        Q, R, _ = boot.noise_model(rec, A, b)
        notes.append("noise by moments of the one-step prediction errors")
    if process_noise is not None:
        Q = _covariance(process_noise, "process_noise")
        notes.append("process noise as given")
    if measurement_noise is not None:
        R = _measurement(measurement_noise, None)
        notes.append("measurement noise as given")
    x0 = fit.initial_states()
    dev = x0 - eq
    steps, spans = [], []
    for _, t, _v in rec.trajectories():
        if t.size > 1:
            steps.append(np.diff(t))
            spans.append(float(t[-1] - t[0]))
    if not steps:
        raise InputError(f"{rec.source}: every run has a single sample; nothing to plan from")
    # ten significant digits: a grid of 2 x 0.29 s reads 0.58, not 0.5799999999999983
    step = float(f"{float(np.median(np.concatenate(steps))):.10g}")
    duration = float(f"{float(np.median(spans)):.10g}")
    unc = fit.uncertainty
    if unc is None:
        unc = boot.bootstrap(
            rec, fit.estimator, fit.estimate, replicates=int(replicates), seed=seed, quiet=quiet
        )
        notes.append(
            f"the fit had no intervals: bootstrap with {int(replicates)} replicates "
            f"(scheme {unc.scheme}) for the current verdict and the drawn systems"
        )
    mats = np.asarray(unc.matrices, dtype=float)
    ok = np.asarray(unc.valid, dtype=bool) & np.all(np.isfinite(mats), axis=(1, 2))
    systems = mats[ok] if ok.any() else None
    return Basis(
        matrix=A,
        equilibrium=eq,
        process_noise=np.asarray(Q, dtype=float),
        measurement_cov=np.asarray(R, dtype=float),
        deviations=np.asarray(dev, dtype=float),
        step=step,
        duration=duration,
        runs=int(rec.n_trajectories),
        method=fit.method,
        equilibrium_known=bool(fit.estimate.equilibrium_known),
        systems=systems,
        systems_from=f"{int(ok.sum())} valid replicate matrices ({unc.scheme})",
        current=_current_of(unc, fit.label),
        source=str(rec.source),
        time_unit=rec.time_unit,
        notes=tuple(notes),
    )


def fit_from_json(
    path: str | os.PathLike, data: str | os.PathLike | None = None, quiet: bool = True
) -> Any:
    """Rebuild the :class:`~fitdyn.analysis.Fit` a ``fitdyn fit --json`` file describes.

    The JSON holds the model and the summaries, not the samples or the replicate
    matrices, so the recording is read again (``data``, else the ``source`` named in
    the file, relative to the working folder or to the JSON's folder) and refitted
    with the method, equilibrium and bootstrap settings (replicates, scheme, seed)
    the file records; the refit must reproduce the file's matrix.
    """
    from fitdyn.analysis import SCHEMA, fit

    p = Path(path)
    try:
        d = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(
            f"{p}: cannot read the fit result ({exc}); give a fitdyn --json file"
        ) from None
    if not isinstance(d, dict) or d.get("schema") != SCHEMA:
        raise InputError(f'{p}: not a fitdyn result (no "schema": "{SCHEMA}")')
    src = data
    if src is None:
        name = d.get("source")
        cands = [Path(str(name)), p.parent / str(name)] if name else []
        src = next((c for c in cands if c.is_file()), None)
        if src is None:
            raise InputError(
                f"{p}: the recording '{name}' it was fitted from is not found; "
                "give the data file with --data"
            )
    cols = (d.get("cleaning") or {}).get("columns") or {}
    read_opts: dict[str, Any] = {}
    if cols.get("time"):
        read_opts["time"] = cols["time"]
    if cols.get("channels"):
        read_opts["channels"] = list(cols["channels"])
    if cols.get("trajectory"):
        read_opts["trajectory"] = cols["trajectory"]
    eq: Any = d["equilibrium"] if d.get("equilibrium_known") else "estimate"
    unc = d.get("uncertainty")
    kw: dict[str, Any] = {}
    if unc is not None:
        # without a recorded seed the replicates cannot be the same ones again: the
        # refit draws new ones (same count, scheme and level)
        kw["confidence"] = float(unc["confidence"])
        kw["seed"] = int(unc["seed"]) if isinstance(unc.get("seed"), int) else None
        if str(unc.get("scheme", "")).startswith("asymptotic"):
            kw["asymptotic"] = True
        else:
            kw["bootstrap"] = int(unc["replicates"])
            kw["scheme"] = unc["scheme"]
            kw["interval"] = unc.get("method", "percentile")
            if unc.get("margin") is not None:
                kw["margin"] = float(unc["margin"])
    result = fit(src, method=d["method"], equilibrium=eq, quiet=quiet, **kw, **read_opts)
    want = np.asarray(d["matrix"], dtype=float)
    if not np.allclose(result.matrix, want, rtol=1e-6, atol=1e-9 * max(np.abs(want).max(), 1)):
        raise InputError(
            f"{p}: refitting '{src}' with method '{d['method']}' does not give the matrix "
            "in the file (the data or the fit options changed); fit again with --json"
        )
    return result


def basis_from_matrix(
    matrix: Any,
    *,
    x0: Any,
    step: float,
    duration: float,
    runs: int = 1,
    equilibrium: Any = None,
    process_noise: Any = None,
    measurement_noise: Any = None,
) -> Basis:
    """The starting point of a plan from a given matrix and noise levels (no uncertainty)."""
    from fitdyn.simulate import _covariance, _matrix, _measurement, _vector2

    A = _matrix(matrix)
    eq = np.zeros(2) if equilibrium is None else _vector2(equilibrium, "equilibrium")
    start = np.asarray(x0, dtype=float)
    start = start[None, :] if start.ndim == 1 else start
    if start.ndim != 2 or start.shape[1] != 2 or not np.all(np.isfinite(start)):
        raise InputError(f"x0 must be two finite numbers (or one pair per run), got {x0!r}")
    for name, v in (("step", step), ("duration", duration)):
        if not (np.isfinite(v) and v > 0):
            raise InputError(f"{name} must be a positive number, got {v!r}")
    if duration < 2 * step:
        raise InputError(f"duration {duration!r} must be at least two steps ({2 * step!r})")
    if int(runs) != runs or runs < 1:
        raise InputError(f"runs must be a positive integer, got {runs!r}")
    Q = np.zeros((2, 2)) if process_noise is None else _covariance(process_noise, "process_noise")
    Rm = _measurement(measurement_noise, None)
    Rm = np.zeros((2, 2)) if Rm is None else Rm
    if not (np.any(Q) or np.any(Rm)):
        raise InputError("give process_noise or measurement_noise (noise-free data need no plan)")
    reps = int(runs)
    dev = np.broadcast_to(start - eq, (start.shape[0], 2))
    return Basis(
        matrix=A,
        equilibrium=eq,
        process_noise=Q,
        measurement_cov=Rm,
        deviations=np.array(dev, dtype=float),
        step=float(step),
        duration=float(duration),
        runs=reps,
        notes=("given matrix: no uncertainty, so no re-check with drawn systems",),
    )


# ----------------------------------------------------------------------------------
# target evaluation
# ----------------------------------------------------------------------------------
def _stable_codes(A: np.ndarray) -> np.ndarray:
    lam = linalg2.eigvals(A)
    return lam.real[..., 0] < 0


def _reached(
    target: str,
    p_stable: np.ndarray,
    p_class: np.ndarray,
    width: np.ndarray,
    confidence: float,
    width_abs: float | None,
) -> np.ndarray:
    # a missing value (a failed fit) never reaches the target
    p_stable = np.nan_to_num(np.asarray(p_stable, dtype=float), nan=0.5)
    p_class = np.nan_to_num(np.asarray(p_class, dtype=float))
    width = np.nan_to_num(np.asarray(width, dtype=float), nan=np.inf)
    if target == "stability":
        return (p_stable >= confidence) | (p_stable <= 1 - confidence)
    if target == "class":
        return p_class >= confidence
    return width <= width_abs


@dataclass(frozen=True)
class _Outcome:
    """Per simulated experiment: P(stable), P(true class), interval width, fit valid."""

    p_stable: np.ndarray
    p_class: np.ndarray
    width: np.ndarray
    valid: np.ndarray
    estimator: str
    estimates: np.ndarray  # (N, 2, 2), NaN where invalid


def _true_codes(true_A: np.ndarray) -> np.ndarray:
    codes, _ = classify.classify_codes(true_A)
    return codes


def _trimmed_cov(X: np.ndarray) -> np.ndarray:
    """Covariance of the simulated estimates without the wildly wrong ones.

    A few fits that did not converge would otherwise widen every experiment's
    interval.  One pass: drop the rows whose squared Mahalanobis distance from the
    median (with the plain covariance) exceeds the chi-square(4) 0.999 quantile
    (18.47, scipy.stats.chi2), then recompute.  Only gross failures go: trimming
    the ordinary tails too would understate the spread (a measured effect: a 0.30
    probability became 0.41 with three rounds at the 0.99 quantile).
    """
    cov = np.cov(X, rowvar=False)
    d = X - np.median(X, axis=0)
    d2 = np.einsum("ni,ij,nj->n", d, np.linalg.pinv(cov), d)
    keep = d2 <= 18.47
    if keep.sum() >= 6 and not keep.all():
        cov = np.cov(X[keep], rowvar=False)
    return cov


def _spread_outcome(
    est_A: np.ndarray,
    valid: np.ndarray,
    true_A: np.ndarray,
    confidence: float,
    draws: int,
    rng: np.random.Generator,
    cov: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Probabilities and widths from N(estimate, spread covariance) draws."""
    N = est_A.shape[0]
    flat = est_A.reshape(N, 4)
    if cov is None:
        good = flat[valid]
        if good.shape[0] < 6:
            nan = np.full(N, np.nan)
            return nan, nan, nan, nan, np.full((4, 4), np.nan)
        cov = _trimmed_cov(good)
    w, V = np.linalg.eigh(0.5 * (cov + cov.T))
    L = V * np.sqrt(np.clip(w, 0, None))
    z = rng.standard_normal((draws, 4)) @ L.T  # common random numbers for every experiment
    p_st = np.full(N, np.nan)
    p_cl = np.full(N, np.nan)
    wid = np.full(N, np.nan)
    cover = np.full(N, np.nan)
    true_mr = np.broadcast_to(
        linalg2.eigvals(np.asarray(true_A).reshape(-1, 2, 2)).real[:, 0], (N,)
    )
    idx = np.flatnonzero(valid)
    tcodes = _true_codes(true_A)
    lo_q, hi_q = 0.5 - confidence / 2, 0.5 + confidence / 2
    for start in range(0, idx.size, 64):  # chunks bound the memory
        sel = idx[start : start + 64]
        M = (flat[sel, None, :] + z[None]).reshape(-1, 2, 2)
        lam = linalg2.eigvals(M)
        mr = lam.real[:, 0].reshape(sel.size, draws)
        p_st[sel] = np.mean(mr < 0, axis=1)
        codes, _ = classify.classify_codes(M)
        codes = codes.reshape(sel.size, draws)
        tc = tcodes[sel] if tcodes.ndim else np.full(sel.size, tcodes)
        p_cl[sel] = np.mean(codes == tc[:, None], axis=1)
        q = np.quantile(mr, [lo_q, hi_q], axis=1)
        wid[sel] = q[1] - q[0]
        cover[sel] = (q[0] <= true_mr[sel]) & (true_mr[sel] <= q[1])
    return p_st, p_cl, wid, cover, cov


# ----------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class DesignResult:
    """The simulated performance of one design.

    Attributes
    ----------
    design : Design
    estimator : str
        The estimator ``auto`` chose for the design's family.
    n : int
        Simulated experiments from the point estimate.
    p : float
        Fraction that reached the target; ``se`` its Monte Carlo standard error.
    failed : int
        Simulated experiments whose fit failed (counted as not reaching the target).
    wrong : float or None
        Stability target: fraction decided on the wrong side.
    median_width : float
        Median interval width of the largest real part.
    uncertainty : str
        How each simulated experiment got its uncertainty (``"spread"``,
        ``"bootstrap"`` or ``"full"``).
    coverage : float
        Fraction of the simulated experiments whose interval of the largest real part
        covers the true value (near ``confidence`` when the intervals are calibrated;
        a low value flags a biased estimator whose narrow intervals mislead).
    n_drawn, p_drawn, se_drawn : int, float, float
        The same from systems drawn from the fit's uncertainty (0 / NaN when not
        re-checked).
    status : str
        ``"ok"`` or why the design could not be simulated.
    """

    design: Design
    estimator: str
    n: int
    p: float
    se: float
    failed: int
    wrong: float | None
    median_width: float
    coverage: float = float("nan")
    uncertainty: str = "-"
    n_drawn: int = 0
    p_drawn: float = float("nan")
    se_drawn: float = float("nan")
    status: str = "ok"

    def to_dict(self, cost: str) -> dict[str, Any]:
        """JSON-ready row."""

        def num(v: Any) -> Any:
            return None if v is None or not np.isfinite(v) else float(v)

        return {
            **self.design.to_dict(),
            "cost": self.design.cost(cost),
            "estimator": self.estimator,
            "simulated": self.n,
            "p": num(self.p),
            "se": num(self.se),
            "failed": self.failed,
            "wrong": num(self.wrong),
            "median_width": num(self.median_width),
            "coverage": num(self.coverage),
            "uncertainty": self.uncertainty,
            "simulated_drawn": self.n_drawn,
            "p_drawn": num(self.p_drawn),
            "se_drawn": num(self.se_drawn),
            "status": self.status,
        }


@dataclass(frozen=True)
class Plan:
    """The result of :func:`plan`.

    Attributes
    ----------
    target : str
    width : float or None
        Absolute width bound (1/time units) of the ``"width"`` target.
    width_text : str or None
        The width as given (``"0.02"`` or ``"20%"``).
    probability : float
        Required probability of reaching the target.
    confidence : float
        Confidence of the verdicts and intervals in each simulated experiment.
    cost : str
        ``"samples"`` or ``"time"``.
    intervals : str
        How simulated experiments were fitted (module notes).
    replicates : int
        Bootstrap replicates per simulated experiment (``"bootstrap"`` mode).
    simulations : int
        Simulated experiments per design.
    seed : Any
    basis : Basis
    rows : tuple of DesignResult
        Sorted by cost.
    chosen : int or None
        Index into ``rows`` of the cheapest design reaching the target under the
        point estimate.
    chosen_drawn : int or None
        Cheapest design also reaching it under the drawn systems.
    met_now : bool or None
        Whether the current data already reach the target (None: no current data).
    elapsed : float
        Seconds.
    notes : tuple of str
    """

    target: str
    width: float | None
    width_text: str | None
    probability: float
    confidence: float
    cost: str
    intervals: str
    replicates: int
    simulations: int
    seed: Any
    basis: Basis
    rows: tuple[DesignResult, ...]
    chosen: int | None
    chosen_drawn: int | None
    met_now: bool | None
    elapsed: float
    notes: tuple[str, ...] = field(default=())

    # -- text ------------------------------------------------------------------------
    def _target_text(self) -> str:
        c = f"{100 * self.confidence:g} %"
        if self.target == "stability":
            lo = 1 - self.confidence
            return f"stability decided at {c} (P(stable) >= {self.confidence:g} or <= {lo:.3g})"
        if self.target == "class":
            return f"class probability of the true class >= {self.confidence:g}"
        u = f" 1/{self.basis.time_unit}" if self.basis.time_unit else ""
        rel = (
            f" ({self.width_text} of |Re lambda_max|)"
            if self.width_text and self.width_text.endswith("%")
            else ""
        )
        return f"{c} interval of the largest real part at most {self.width:.4g}{u} wide{rel}"

    def table(self, fmt: str = "markdown") -> str:
        """The designs, cheapest first, as a markdown or plain-text table."""
        tu = self.basis.time_unit or "time units"
        head = [
            "step",
            "duration",
            "runs",
            "amplitude",
            "samples",
            "cost",
            "estimator",
            "P(reach) +- SE",
            "P drawn +- SE",
            "median width",
            "coverage",
            "note",
        ]
        body = []
        pruned = 0
        for i, r in enumerate(self.rows):
            if r.status == PRUNED:
                pruned += 1
                continue
            d = r.design
            mark = []
            if i == self.chosen:
                mark.append("chosen")
            if i == self.chosen_drawn:
                mark.append("chosen (drawn systems)")
            if r.status != "ok":
                mark.append(r.status)
            elif r.failed:
                mark.append(f"{r.failed} fits failed")
            if r.wrong:
                mark.append(f"{100 * r.wrong:.0f} % decided wrongly")
            pd = "-" if r.n_drawn == 0 else f"{r.p_drawn:.2f} +- {r.se_drawn:.2f}"
            p = "-" if not np.isfinite(r.p) else f"{r.p:.2f} +- {r.se:.2f}"
            body.append(
                [
                    f"{d.step:.4g}",
                    f"{d.duration:.4g}",
                    str(d.runs),
                    f"{d.amplitude:g}",
                    str(d.total_samples),
                    f"{d.cost(self.cost):.4g}",
                    r.estimator if r.uncertainty == "-" else f"{r.estimator} ({r.uncertainty})",
                    p,
                    pd,
                    "-" if not np.isfinite(r.median_width) else f"{r.median_width:.3g}",
                    "-" if not np.isfinite(r.coverage) else f"{r.coverage:.2f}",
                    "; ".join(mark),
                ]
            )
        tail = (
            f"{pruned} longer designs not simulated: a shorter run of their family (same "
            "step, runs and amplitude) already reaches the target."
            if pruned
            else ""
        )
        if fmt == "markdown":
            lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
            lines += ["| " + " | ".join(row) + " |" for row in body]
            lines.append("")
            if tail:
                lines.append(tail + " ")
            lines.append(
                f"Step and duration in {tu}; cost = "
                + ("total samples" if self.cost == "samples" else f"duration x runs ({tu})")
                + f"; {self.simulations} simulated experiments per design; SE = binomial "
                "Monte Carlo standard error."
            )
            return "\n".join(lines)
        widths = [max(len(h), *(len(row[k]) for row in body)) for k, h in enumerate(head)]
        out = ["  ".join(h.ljust(widths[k]) for k, h in enumerate(head)).rstrip()]
        out += ["  ".join(c.ljust(widths[k]) for k, c in enumerate(row)).rstrip() for row in body]
        if tail:
            out.append(tail)
        return "\n".join(out)

    def summary(self) -> str:
        """What a person reads: the answer, its error, the table."""
        b = self.basis
        tu = f" {b.time_unit}" if b.time_unit else ""
        lines = ["fitdyn plan -- the next experiment, by simulation"]
        lines.append(f"  from            {b.source}" + (f" ({b.method})" if b.method else ""))
        lines.append(
            f"  current design  step {b.step:.4g}{tu}, runs of {b.duration:.4g}{tu}, "
            f"{b.runs} run(s)"
        )
        lines.append(
            f"  target          {self._target_text()}, with probability >= {self.probability:g}"
        )
        lines.append(
            f"  simulation      {self.simulations} experiments per design, intervals "
            f"'{self.intervals}'"
            + (f" ({self.replicates} replicates)" if self.intervals == "bootstrap" else "")
            + f", seed {self.seed}; {self.elapsed:.1f} s"
        )
        if self.met_now is not None:
            cur = b.current or {}
            lines.append(
                "  current data    "
                + ("already reach the target" if self.met_now else "do not reach the target")
                + f" (P(stable) {cur.get('p_stable', float('nan')):.3g}, largest real part "
                + f"in [{cur['max_real_part'][0]:.4g}, {cur['max_real_part'][1]:.4g}])"
            )
        lines.append("")
        if self.chosen is None:
            lines.append(
                "No candidate design reaches the target with the required probability; "
                "widen the grid (longer runs, more runs) or relax the target."
            )
        else:
            r = self.rows[self.chosen]
            d = r.design
            lines.append(
                f"Cheapest design: step {d.step:.4g}{tu}, {d.runs} run(s) of {d.duration:.4g}{tu}, "
                f"initial displacement x{d.amplitude:g} ({d.total_samples} samples): "
                f"P(reach) = {r.p:.2f} +- {r.se:.2f} (n = {r.n}) under the point estimate"
            )
            if r.n_drawn:
                lines.append(
                    f"  re-checked with systems drawn from the fit's uncertainty: "
                    f"P(reach) = {r.p_drawn:.2f} +- {r.se_drawn:.2f} (n = {r.n_drawn})"
                )
            if abs(r.p - self.probability) < 2 * r.se:
                lines.append(
                    "  borderline: within two Monte Carlo standard errors of the required "
                    "probability; rerun with more simulations to settle it"
                )
            if self.chosen_drawn is not None and self.chosen_drawn != self.chosen:
                r2 = self.rows[self.chosen_drawn]
                d2 = r2.design
                lines.append(
                    "Cheapest design that also holds under the drawn systems: "
                    f"step {d2.step:.4g}{tu}, "
                    f"{d2.runs} run(s) of {d2.duration:.4g}{tu}, x{d2.amplitude:g}: "
                    f"P = {r2.p_drawn:.2f} +- {r2.se_drawn:.2f}"
                )
            elif self.chosen_drawn is None and b.systems is not None:
                lines.append(
                    "  no re-checked design reaches the target under the drawn systems: the "
                    "fitted model is itself uncertain enough that the plan may not hold"
                )
        lines.append("")
        lines.append(self.table("text"))
        for n in (*b.notes, *self.notes):
            lines.append(f"note: {n}")
        lines.append("")
        lines.append("Caution: " + CAUTION)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def to_dict(self) -> dict[str, Any]:
        """Machine-readable plan (``"schema": "fitdyn-plan/1"``)."""
        return {
            "schema": "fitdyn-plan/1",
            "target": self.target,
            "width": self.width,
            "width_given": self.width_text,
            "probability": self.probability,
            "confidence": self.confidence,
            "cost": self.cost,
            "intervals": self.intervals,
            "replicates": self.replicates,
            "simulations": self.simulations,
            "seed": self.seed if isinstance(self.seed, (int, type(None))) else str(self.seed),
            "met_now": self.met_now,
            "chosen": None if self.chosen is None else self.rows[self.chosen].to_dict(self.cost),
            "chosen_drawn": (
                None
                if self.chosen_drawn is None
                else self.rows[self.chosen_drawn].to_dict(self.cost)
            ),
            "designs": [r.to_dict(self.cost) for r in self.rows],
            "basis": self.basis.to_dict(),
            "notes": list(self.notes),
            "caution": CAUTION,
        }

    def to_json(self, path: str | os.PathLike | None = None) -> str:
        """JSON text; written atomically when ``path`` is given."""
        text = json.dumps(self.to_dict(), indent=2, allow_nan=False)
        if path is not None:
            from fitdyn.atomic import write_text

            write_text(path, text + "\n")
        return text

    def write_table(self, path: str | os.PathLike, fmt: str | None = None) -> Path:
        """The table, atomically (markdown for ``.md``, plain text otherwise)."""
        from fitdyn.atomic import write_text

        kind = fmt or ("markdown" if str(path).endswith(".md") else "text")
        return write_text(path, self.table(kind) + "\n")

    def plot(self, path: str | os.PathLike | None = None, ax: Any = None) -> Any:
        """Probability of reaching the target against duration, one line per family.

        Families are step x runs x amplitude; error bars are one Monte Carlo SE; the
        dashed line is the required probability.  Written atomically to ``path``
        (format from its suffix) when given; returns the figure.
        """
        if ax is None:
            from matplotlib.figure import Figure

            fig = Figure(figsize=(7.5, 4.8))
            ax = fig.add_subplot()
        else:
            fig = ax.figure
        fams: dict[tuple[float, int, float], list[DesignResult]] = {}
        for r in self.rows:
            fams.setdefault(r.design.family, []).append(r)
        tu = self.basis.time_unit or "time units"
        nf = max(len(fams), 1)
        for j, ((h, R, amp), rs) in enumerate(sorted(fams.items())):
            rs = sorted(
                (r for r in rs if r.n > 0 and np.isfinite(r.p)), key=lambda r: r.design.duration
            )
            if not rs:
                continue
            # a small horizontal offset per family keeps coinciding points visible
            shift = 1.0 + 0.04 * (j - (nf - 1) / 2) / nf
            x = [r.design.duration * shift for r in rs]
            line = ax.errorbar(
                x,
                [r.p for r in rs],
                yerr=[r.se for r in rs],
                marker="o",
                ms=4,
                capsize=2,
                lw=1.2,
                color=f"C{j % 10}",
                ls=("-", "--", ":")[(j // 10) % 3],  # ten colours, then new line styles
                label=f"step {h:.3g}, {R} run(s), x{amp:g}",
            )
            drawn = [(xi, r) for xi, r in zip(x, rs, strict=True) if r.n_drawn]
            if drawn:
                ax.errorbar(
                    [d[0] for d in drawn],
                    [d[1].p_drawn for d in drawn],
                    yerr=[d[1].se_drawn for d in drawn],
                    marker="o",
                    ms=7,
                    mfc="none",
                    ls="none",
                    capsize=2,
                    color=line[0].get_color(),
                )
        if self.chosen is not None:
            c = self.rows[self.chosen]
            ax.plot(
                [c.design.duration], [c.p], marker="*", ms=16, color="k", ls="none", label="chosen"
            )
        if any(r.n_drawn for r in self.rows):
            ax.plot(
                [],
                [],
                marker="o",
                ms=7,
                mfc="none",
                ls="none",
                color="0.3",
                label="re-checked with drawn systems",
            )
        ax.axhline(self.probability, ls="--", color="0.4", lw=1)
        ax.set_xscale("log")
        ax.set_ylim(-0.03, 1.03)
        ax.set_xlabel(f"duration of each run ({tu})")
        ax.set_ylabel("probability of reaching the target")
        ax.set_title(
            f"target: {self.target}; {self.simulations} simulated experiments per design",
            fontsize=10,
        )
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
        ax.grid(alpha=0.3)
        if path is not None:
            from fitdyn.atomic import write_with

            suffix = Path(path).suffix.lstrip(".") or "png"
            write_with(path, lambda p: fig.savefig(p, format=suffix, dpi=120, bbox_inches="tight"))
        return fig


# ----------------------------------------------------------------------------------
# the simulation
# ----------------------------------------------------------------------------------
def _grid(
    basis: Basis,
    steps: Any,
    durations: Any,
    runs: Any,
    amplitudes: Any,
) -> list[Design]:
    """Candidate designs; ``None`` arguments take the default factors of the current design."""

    def positive(vals: Any, name: str) -> list[float]:
        out = [float(v) for v in np.atleast_1d(np.asarray(vals, dtype=float))]
        if not out or not all(np.isfinite(v) and v > 0 for v in out):
            raise InputError(f"{name} must be positive numbers, got {vals!r}")
        return sorted(set(out))

    st = positive(steps if steps is not None else [f * basis.step for f in STEP_FACTORS], "steps")
    du = positive(
        durations if durations is not None else [f * basis.duration for f in DURATION_FACTORS],
        "durations",
    )
    ru = runs if runs is not None else [f * basis.runs for f in RUN_FACTORS]
    rr = sorted({int(r) for r in np.atleast_1d(ru)})
    if not rr or any(int(r) != float(r) or r < 1 for r in np.atleast_1d(ru)):
        raise InputError(f"runs must be positive integers, got {ru!r}")
    am = positive(amplitudes if amplitudes is not None else AMPLITUDES, "amplitudes")
    out = []
    for h in st:  # family by family (step x runs x amplitude), shortest run first
        for R in rr:
            for a in am:
                for T in du:
                    if T >= 3 * h:  # at least 4 samples per run
                        out.append(Design(step=h, duration=T, runs=R, amplitude=a))
    if not out:
        raise InputError(
            "no candidate design has at least 4 samples per run; lengthen the durations"
        )
    return out


def _simulate_batch(
    basis: Basis, d: Design, A: np.ndarray, n: int, rng: np.random.Generator
) -> Any:
    from fitdyn.simulate import simulate

    return simulate(
        A,
        basis.equilibrium,
        basis.initial_states(d.runs, d.amplitude),
        d.times(),
        process_noise=basis.process_noise if np.any(basis.process_noise) else None,
        measurement_cov=basis.measurement_cov if np.any(basis.measurement_cov) else None,
        trajectories=d.runs,
        seed=rng,
        replicates=n,
        time_unit=basis.time_unit,
    )


def _fit_batch(
    est: Any, rec0: Any, values: np.ndarray, eq: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Batched refit of simulated values (chunks of 64) -> matrices (N, 2, 2), valid (N,)."""
    mats, oks = [], []
    for s in range(0, values.shape[0], 64):
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            try:
                sb = est.fit_values(rec0, values[s : s + 64], eq)
                M, ok = np.asarray(sb.matrix, float), np.asarray(sb.valid, bool)
            except FitdynError:
                M = np.full((values[s : s + 64].shape[0], 2, 2), np.nan)
                ok = np.zeros(M.shape[0], bool)
        ok = ok & np.all(np.isfinite(M), axis=(1, 2))
        mats.append(np.where(ok[:, None, None], M, np.nan))
        oks.append(ok)
    return np.concatenate(mats), np.concatenate(oks)


def _loop_outcome(
    batch: Any,
    est: Any,
    eq: np.ndarray | None,
    true_A: np.ndarray,
    mode: str,
    replicates: int,
    confidence: float,
    rng: np.random.Generator,
) -> tuple[np.ndarray, ...]:
    """Per-experiment fits with a bootstrap (``bootstrap``) or fitdyn.fit (``full``)."""
    from fitdyn import bootstrap as boot
    from fitdyn.analysis import fit

    N = batch.n_replicates
    p_st, p_cl, wid, cover = (np.full(N, np.nan) for _ in range(4))
    true_mr = np.broadcast_to(
        linalg2.eigvals(np.asarray(true_A).reshape(-1, 2, 2)).real[:, 0], (N,)
    )
    mats = np.full((N, 2, 2), np.nan)
    valid = np.zeros(N, bool)
    tcodes = np.broadcast_to(_true_codes(true_A), (N,))
    seeds = rng.integers(2**63, size=N)
    for i in range(N):
        rec = batch.recording(i)
        try:
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                if mode == "full":
                    f = fit(
                        rec,
                        method="auto",
                        equilibrium="estimate" if eq is None else eq,
                        bootstrap=FULL_REPLICATES,
                        confidence=confidence,
                        seed=int(seeds[i]),
                        quiet=True,
                    )
                    e, u = f.estimate, f.uncertainty
                else:
                    e = est.fit(rec, eq)
                    u = boot.bootstrap(
                        rec,
                        est,
                        e,
                        replicates=replicates,
                        confidence=confidence,
                        seed=int(seeds[i]),
                        quiet=True,
                    )
        except FitdynError:
            continue
        if not np.all(np.isfinite(e.matrix)):
            continue
        valid[i] = True
        mats[i] = e.matrix
        p_st[i] = u.p_stable
        label = classify.LABELS[int(tcodes[i])]
        p_cl[i] = float(u.class_probabilities.get(label, 0.0))
        iv = np.asarray(u.intervals["max_real_part"], dtype=float)
        wid[i] = iv[1] - iv[0]
        cover[i] = float(iv[0] <= true_mr[i] <= iv[1])
    return p_st, p_cl, wid, cover, mats, valid


def plan(
    source: Any = None,
    *,
    target: str = "stability",
    width: float | str | None = None,
    probability: float = 0.8,
    confidence: float = 0.95,
    cost: str = "samples",
    simulations: int = 60,
    intervals: str = "spread",
    method: str = "auto",
    replicates: int = 100,
    draws: int = 400,
    steps: Any = None,
    durations: Any = None,
    runs: Any = None,
    amplitudes: Any = None,
    rechecks: int = 4,
    stage_size: int = 24,
    budget: int = 250_000,
    prune: bool = True,
    seed: Any = None,
    data: Any = None,
    matrix: Any = None,
    x0: Any = None,
    step: float | None = None,
    duration: float | None = None,
    current_runs: int = 1,
    equilibrium: Any = None,
    process_noise: Any = None,
    measurement_noise: Any = None,
    quiet: bool = False,
) -> Plan:
    """Plan the next experiment: the cheapest design that reaches a target.

    Parameters
    ----------
    source : Fit or path, optional
        A fitted result or its JSON file (``fitdyn fit --json``).  Omit it and give
        ``matrix``, ``x0``, ``step``, ``duration`` and the noise instead.
    target : {"stability", "class", "width"}
        What the next experiment must settle (module notes).
    width : float or str
        The width bound of the ``"width"`` target: absolute (1/time units), or
        relative to ``|Re lambda_max|`` of the point estimate as ``"20%"``.
    probability : float
        Required probability that a real experiment reaches the target (0.8).
    confidence : float
        Confidence of the verdicts and intervals (0.95).
    cost : {"samples", "time"}
        Total samples (default) or duration x runs.
    simulations : int
        Simulated experiments per design (60); the Monte Carlo SE of a probability
        near 0.8 is then about 0.05.
    intervals : {"auto", "spread", "bootstrap", "full"}
        How each simulated experiment gets its uncertainty (module notes).
    method : str
        ``"auto"`` (default: what ``fit`` does, chosen once per design family) or
        one estimator's name, used for every simulated experiment.
    replicates : int
        Bootstrap replicates per simulated experiment with ``intervals="bootstrap"``.
    draws : int
        Normal draws per simulated experiment with ``intervals="spread"``.
    steps, durations, runs, amplitudes : sequences, optional
        The grid (absolute steps and durations, run counts, amplitude factors);
        default: steps x(2, 1, 0.5), durations x(0.5, 1, 2, 4) of the current ones,
        runs x(1, 2), amplitudes (1, 2).
    stage_size : int
        Simulated experiments are run in stages of this many; a design stops early
        when a one-sided exact binomial test at level 0.01 already puts its
        probability clearly above or below ``probability`` (a sequential check that
        saves time on clear cases; the SE is reported with the actual count).
    budget : int
        Bound on the work of the iterative estimators (output-error, Kalman,
        prediction-error, nonlinear instrumental fits) with ``intervals="spread"``,
        in samples x fitted parameters (6, plus two initial states per run for the
        output-error fit) summed over the simulated experiments; spent on the
        cheapest designs first; designs beyond it are listed as not simulated.  The
        regression estimators cost next to nothing and are not counted.  A count,
        not a clock, so the same seed gives the same plan on any machine.
    prune : bool
        Skip the longer runs of a family (same step, runs, amplitude) once a shorter
        one clearly reaches the target: a longer run costs more under either cost,
        so it cannot be the cheapest (its table row says so).
    rechecks : int
        At most this many designs (cheapest first among those reaching the target)
        are re-checked with systems drawn from the fit's uncertainty.
    seed : int, optional
        The same seed gives the same plan.
    data : path, optional
        The recording a JSON ``source`` was fitted from (default: its ``source``).
    matrix, x0, step, duration, current_runs, equilibrium : optional
        A given model and current design (instead of ``source``).
    process_noise, measurement_noise : optional
        Q (scalar or 2x2) and measurement standard deviations; with a ``source``
        they override the estimated noise.
    quiet : bool
        No progress bar (also silent when stderr is not a terminal).

    Returns
    -------
    Plan
    """
    t_start = time.perf_counter()
    if target not in TARGETS:
        raise InputError(f"target must be one of {', '.join(TARGETS)}, got '{target}'")
    from fitdyn.estimators import METHODS

    if method not in METHODS:
        raise InputError(f"method must be one of {', '.join(METHODS)}, got '{method}'")
    if intervals not in INTERVALS:
        raise InputError(f"intervals must be one of {', '.join(INTERVALS)}, got '{intervals}'")
    if cost not in COSTS:
        raise InputError(f"cost must be 'samples' or 'time', got '{cost}'")
    if not 0 < probability < 1:
        raise InputError(f"probability must be between 0 and 1, got {probability!r}")
    if not 0.5 < confidence < 1:
        raise InputError(f"confidence must be between 0.5 and 1, got {confidence!r}")
    for name, v, lo in (
        ("simulations", simulations, 10),
        ("replicates", replicates, 20),
        ("draws", draws, 50),
        ("rechecks", rechecks, 0),
        ("stage_size", stage_size, 5),
        ("budget", budget, 0),
    ):
        if int(v) != v or v < lo:
            raise InputError(f"{name} must be an integer of at least {lo}, got {v!r}")
    if target == "width" and width is None:
        raise InputError(
            "the width target needs a width: an absolute width or a percentage like 20%"
        )
    if target != "width" and width is not None:
        raise InputError(f"a width applies to the width target only, not to '{target}'")
    ss = np.random.SeedSequence(seed)
    s_basis, s_designs, s_drawn = ss.spawn(3)
    basis_seed = int(s_basis.generate_state(1, np.uint64)[0])

    if source is None:
        if matrix is None:
            raise InputError("give a fitted result (a Fit or its JSON file) or a matrix")
        if x0 is None or step is None or duration is None:
            raise InputError("with a matrix give x0, step and duration of the current design")
        basis = basis_from_matrix(
            matrix,
            x0=x0,
            step=step,
            duration=duration,
            runs=current_runs,
            equilibrium=equilibrium,
            process_noise=process_noise,
            measurement_noise=measurement_noise,
        )
    else:
        if matrix is not None:
            raise InputError("give either a fitted result or a matrix, not both")
        from fitdyn.analysis import Fit

        fitted = source if isinstance(source, Fit) else fit_from_json(source, data, quiet=True)
        basis = basis_from_fit(
            fitted,
            process_noise=process_noise,
            measurement_noise=measurement_noise,
            seed=basis_seed,
            quiet=quiet,
        )

    lam_point = linalg2.eigvals(basis.matrix[None])[0]
    width_abs: float | None = None
    width_text: str | None = None
    if target == "width":
        width_text = str(width).strip()
        try:
            if width_text.endswith("%"):
                frac = float(width_text[:-1]) / 100
                width_abs = frac * abs(float(lam_point.real[0]))
            else:
                width_abs = float(width_text)
        except ValueError:
            raise InputError(
                f"width must be a number or a percentage like 20%, got '{width}'"
            ) from None
        if not (np.isfinite(width_abs) and width_abs > 0):
            raise InputError(f"width must be positive, got '{width}' (= {width_abs!r})")

    met_now: bool | None = None
    if basis.current is not None:
        cur = basis.current
        iv = cur["max_real_part"]
        met_now = bool(
            _reached(
                target,
                np.array(cur["p_stable"]),
                np.array(cur["class_probabilities"].get(cur["label"], 0.0)),
                np.array(iv[1] - iv[0]),
                confidence,
                width_abs,
            )
        )

    designs = _grid(basis, steps, durations, runs, amplitudes)
    designs.sort(key=lambda d: (d.cost(cost), d.duration, d.step, d.runs, d.amplitude))
    eq = basis.equilibrium if basis.equilibrium_known else None
    design_seeds = s_designs.spawn(len(designs))
    estimators: dict[tuple[float, int, float], tuple[Any, str]] = {}
    rows: list[DesignResult] = []
    covs: dict[int, np.ndarray] = {}
    notes: list[str] = []
    N = int(simulations)
    stage = min(int(stage_size), N)
    true_st = bool(_stable_codes(basis.matrix[None])[0])
    settled: set[tuple[float, int, float]] = set()
    spent = 0
    over_budget = 0
    bar = _progress(len(designs), quiet)
    try:
        # cheapest first: the budget is spent where the answer is
        for k, d in enumerate(designs):
            fam = d.family
            if prune and fam in settled:
                rows.append(_skipped(d, estimators.get(fam, (None, "-"))[1], PRUNED))
                if bar is not None:
                    bar.update(1)
                continue
            kids = design_seeds[k].spawn(2 + -(-N // stage))
            draw_seed, cov_seed, chunk_seeds = kids[0], kids[1], kids[2:]
            fitted: list[tuple[np.ndarray, ...]] = []
            cov = None
            status = "ok"
            est_name = "-"
            for c, cs in enumerate(chunk_seeds):
                n_c = min(stage, N - c * stage)
                rng = np.random.default_rng(cs)
                try:
                    batch = _simulate_batch(basis, d, basis.matrix, n_c, rng)
                except FitdynError as exc:
                    status = f"not simulated: {exc}"
                    break
                rec0 = batch.recording(0)
                if fam not in estimators:
                    estimators[fam] = _choose(rec0, eq, method)
                est, est_name = estimators[fam]
                if est is None:
                    status = f"auto failed: {est_name}"
                    break
                mode = _mode(intervals, est)
                if mode == "spread" and not est.is_regression:
                    need = n_c * d.total_samples * _parameters(est.name, d.runs)
                    if spent + need > budget:
                        if not fitted:
                            status = BUDGET
                        else:
                            over_budget += 1
                        break
                    spent += need
                if mode == "spread":
                    mats, valid = _fit_batch(est, rec0, batch.values, eq)
                    fitted.append((mats, valid))
                    allm = np.concatenate([f[0] for f in fitted])
                    allv = np.concatenate([f[1] for f in fitted])
                    if est.is_regression and cov is None:
                        # the 4 x 4 covariance of a few dozen estimates is too noisy (its
                        # correlations decide the largest real part's spread): a
                        # regression refits COV_SIMULATIONS more experiments at no cost
                        extra = _simulate_batch(
                            basis,
                            d,
                            basis.matrix,
                            COV_SIMULATIONS,
                            np.random.default_rng(cov_seed),
                        )
                        em, ev = _fit_batch(est, rec0, extra.values, eq)
                        good = em[ev].reshape(-1, 4)
                        if good.shape[0] >= 6:
                            cov = _trimmed_cov(good)
                    p_st, p_cl, wid, cover, cov_used = _spread_outcome(
                        allm,
                        allv,
                        basis.matrix,
                        confidence,
                        draws,
                        np.random.default_rng(draw_seed),
                        cov if est.is_regression else None,
                    )
                    cov = cov if est.is_regression else cov_used
                else:
                    out = _loop_outcome(
                        batch, est, eq, basis.matrix, mode, replicates, confidence, rng
                    )
                    fitted.append(out)
                    p_st, p_cl, wid, cover = (
                        np.concatenate([f[j] for f in fitted]) for j in (0, 1, 2, 3)
                    )
                    allv = np.concatenate([f[5] for f in fitted])
                ok = _reached(target, p_st, p_cl, wid, confidence, width_abs) & allv
                side = _decided(int(ok.sum()), ok.size, probability)
                if side is not None and ok.size < N:
                    break  # the binomial check already separates p from the required one
            if status != "ok":
                rows.append(_skipped(d, est_name, status))
                if bar is not None:
                    bar.update(1)
                continue
            n = int(ok.size)
            p = float(ok.mean())
            wrong = None
            if target == "stability":
                ps = np.nan_to_num(p_st, nan=0.5)
                decided_wrong = (ps <= 1 - confidence) if true_st else (ps >= confidence)
                wrong = float(np.mean(allv & decided_wrong))
            if cov is not None:
                covs[k] = cov
            if _decided(int(ok.sum()), n, probability) == "above":
                settled.add(fam)
            rows.append(
                DesignResult(
                    design=d,
                    estimator=est_name,
                    n=n,
                    p=p,
                    se=float(mc_se(p, n)),
                    failed=int(n - allv.sum()),
                    wrong=wrong,
                    median_width=(
                        float(np.nanmedian(wid)) if np.any(np.isfinite(wid)) else float("nan")
                    ),
                    coverage=float(np.nanmean(cover))
                    if np.any(np.isfinite(cover))
                    else float("nan"),
                    uncertainty=mode,
                )
            )
            if bar is not None:
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()

    order = sorted(
        range(len(rows)),
        key=lambda i: (
            rows[i].design.cost(cost),
            rows[i].design.duration,
            rows[i].design.step,
            rows[i].design.amplitude,
        ),
    )
    rows = [rows[i] for i in order]
    covs = {order.index(k): v for k, v in covs.items()}
    reach = [i for i, r in enumerate(rows) if r.status == "ok" and r.p >= probability]
    chosen = reach[0] if reach else None

    # re-check with systems drawn from the fit's uncertainty (cheapest first)
    chosen_drawn: int | None = None
    if basis.systems is not None and reach and rechecks > 0:
        drng = np.random.default_rng(s_drawn)
        for i in reach[: int(rechecks)]:
            r = rows[i]
            d = r.design
            pick = drng.choice(basis.systems.shape[0], size=N, replace=basis.systems.shape[0] < N)
            systems = basis.systems[pick]
            est, _ = estimators[d.family]
            hits = np.zeros(N, bool)
            vals = []
            for j in range(N):
                try:
                    b1 = _simulate_batch(basis, d, systems[j], 1, drng)
                except FitdynError:
                    vals.append(None)
                    continue
                vals.append(b1.values[0])
            good = [j for j in range(N) if vals[j] is not None]
            if good:
                from fitdyn.simulate import SimulatedBatch

                tmpl = _simulate_batch(basis, d, basis.matrix, 1, np.random.default_rng(0))
                stacked = SimulatedBatch(
                    tmpl.times,
                    tmpl.trajectory,
                    np.stack([vals[j] for j in good]),
                    tmpl.channels,
                    tmpl.units,
                    tmpl.time_unit,
                    tmpl.trajectory_names,
                    tmpl.notes,
                )
                res = _evaluate(
                    stacked,
                    tmpl.recording(0),
                    est,
                    eq,
                    systems[good],
                    _mode(intervals, est),
                    replicates,
                    confidence,
                    draws,
                    drng,
                    covs.get(i),
                )
                p_st, p_cl, wid, _cv, _m, valid, _c = res
                ok = _reached(target, p_st, p_cl, wid, confidence, width_abs) & valid
                hits[good] = ok
            pd = float(hits.mean())
            rows[i] = DesignResult(
                **{**r.__dict__, "n_drawn": N, "p_drawn": pd, "se_drawn": float(mc_se(pd, N))}
            )
            if pd >= probability:
                chosen_drawn = i
                break
        notes.append(
            f"drawn systems: {N} per re-checked design, resampled from {basis.systems_from}; "
            "the same noise, equilibrium and initial displacements as the point estimate"
        )
    if intervals in ("auto", "spread"):
        notes.append(
            f"iterative fits used {spent} of the budget of {int(budget)} "
            "samples x parameters"
            + (f"; {over_budget} design(s) stopped early at the budget" if over_budget else "")
        )
    notes.append(
        "candidate designs sample at a uniform step; auto chose the estimator once per family "
        "(step x runs x amplitude) on one simulated experiment and it refitted the rest"
    )
    if any(r.uncertainty == "spread" for r in rows):
        notes.append(
            "uncertainty 'spread': each simulated experiment's uncertainty is N(its estimate, "
            f"the covariance of the design's simulated estimates), {draws} draws"
        )
    if any(r.uncertainty == "bootstrap" for r in rows):
        notes.append(
            f"uncertainty 'bootstrap': fitdyn's bootstrap with {int(replicates)} replicates on "
            "each simulated experiment (the default is 1000)"
        )
    return Plan(
        target=target,
        width=width_abs,
        width_text=width_text,
        probability=float(probability),
        confidence=float(confidence),
        cost=cost,
        intervals=intervals,
        replicates=int(replicates),
        simulations=N,
        seed=seed,
        basis=basis,
        rows=tuple(rows),
        chosen=chosen,
        chosen_drawn=chosen_drawn,
        met_now=met_now,
        elapsed=time.perf_counter() - t_start,
        notes=tuple(notes),
    )


BUDGET = "not simulated: over the budget of iterative fits (raise budget)"

PRUNED = "not simulated: a shorter run of this family already reaches the target"

#: Level of the one-sided binomial checks that stop a design's simulation early.
STOP_LEVEL = 0.01


def _mode(intervals: str, est: Any) -> str:
    """The uncertainty of one family's simulated experiments: ``auto`` bootstraps the
    regression estimators (cheap, and closest to what ``fit`` does) and uses the
    spread for the iterative ones (whose bootstrap would cost a full refit per
    replicate)."""
    if intervals != "auto":
        return intervals
    return "bootstrap" if est.is_regression else "spread"


def _parameters(method: str, runs: int) -> int:
    """Parameters an iterative fit adjusts: A and b, plus the initial states of the
    output-error fit (its cost grows with both)."""
    return 6 + 2 * runs if method == "trajectory" else 6


def _decided(x: int, n: int, probability: float) -> str | None:
    """``"above"`` / ``"below"`` when ``x`` successes in ``n`` put p clearly above or
    below ``probability`` (one-sided exact binomial test at :data:`STOP_LEVEL`), else None."""
    from scipy.stats import binom

    if binom.sf(x - 1, n, probability) < STOP_LEVEL:
        return "above"
    if binom.cdf(x, n, probability) < STOP_LEVEL:
        return "below"
    return None


def _skipped(d: Design, estimator: str, status: str) -> DesignResult:
    nan = float("nan")
    return DesignResult(d, estimator, 0, nan, nan, 0, None, nan, status=status)


def _choose(rec: Any, eq: np.ndarray | None, method: str = "auto") -> tuple[Any, str]:
    """The estimator for one simulated recording: auto's choice, or ``method``'s
    (None and the reason on failure)."""
    from fitdyn.estimators import estimate, get_estimator

    try:
        if method != "auto":
            return get_estimator(method), method
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            _, est = estimate(rec, "auto", eq)
    except FitdynError as exc:
        return None, str(exc)
    return est, est.name


def _evaluate(
    batch: Any,
    rec0: Any,
    est: Any,
    eq: np.ndarray | None,
    true_A: np.ndarray,
    intervals: str,
    replicates: int,
    confidence: float,
    draws: int,
    rng: np.random.Generator,
    cov: np.ndarray | None,
) -> tuple[np.ndarray, ...]:
    if intervals == "spread":
        mats, valid = _fit_batch(est, rec0, batch.values, eq)
        out = _spread_outcome(mats, valid, true_A, confidence, draws, rng, cov)
        return (*out[:4], mats, valid, out[4])
    return (*_loop_outcome(batch, est, eq, true_A, intervals, replicates, confidence, rng), None)


def _progress(total: int, quiet: bool) -> Any:
    disable = quiet or not (hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    if disable:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc="plan", unit="design", leave=False, file=sys.stderr)
