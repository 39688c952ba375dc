"""The main job: fit a recording, classify the equilibrium, quantify the uncertainty.

:func:`fit` runs importer -> estimator -> (bootstrap) -> analysis and returns a
:class:`Fit`, whose :meth:`Fit.summary` a person reads and whose
:meth:`Fit.to_dict` a program reads (layout ``"schema": "fitdyn/1"``, documented in
the README).
"""

from __future__ import annotations

import html
import json
import os
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from fitdyn import __version__, classify, linalg2
from fitdyn.estimators import Estimate, Estimator, estimate
from fitdyn.recording import Recording

__all__ = ["Fit", "fit", "SCHEMA", "CAUTION"]

SCHEMA = "fitdyn/1"

CAUTION = (
    "These are statistical estimates about a linearisation near one equilibrium, made "
    "from noisy data; they say nothing about large disturbances or about behaviour far "
    "from the equilibrium. Decisions that affect safety, health or compliance defer to "
    "local codes and licensed practice."
)


def _fmt(v: float, width: int = 11) -> str:
    if v is None or not np.isfinite(v):
        return f"{'-':>{width}}"
    return f"{v:>{width}.4g}"


def _fmt_complex(z: complex) -> str:
    if abs(z.imag) == 0:
        return f"{z.real:.4g}"
    sign = "+" if z.imag >= 0 else "-"
    return f"{z.real:.4g} {sign} {abs(z.imag):.4g}i"


@dataclass(frozen=True)
class Fit:
    """A fitted linear system with its classification and (optional) uncertainty.

    Attributes
    ----------
    recording : Recording
        The cleaned data that were fitted.
    estimate : Estimate
        The estimator's result.
    estimator : Estimator
        The estimator instance (the bootstrap reuses it).
    label : str
        Class of the equilibrium (one of :data:`fitdyn.classify.LABELS`).
    stability : str
        Stability verdict (one of :data:`fitdyn.classify.STABILITY`).
    eigenvalues : complex ndarray, shape (2,)
        Sorted: larger real part first, then positive imaginary part first.
    eigenvectors : complex ndarray, shape (2, 2)
        Unit eigenvectors as columns, matching ``eigenvalues``.
    uncertainty : object or None
        :class:`fitdyn.bootstrap.Uncertainty` when intervals were asked for.
    rtol : float
        Tolerance used for the boundary classes.
    warnings : tuple of str
        Everything the user must know, from every stage.
    diagnostics : tuple of Diagnostic
        The adequacy checks (:mod:`fitdyn.diagnostics`); every warn or fail is
        also in ``warnings``.
    """

    recording: Recording
    estimate: Estimate
    estimator: Estimator = field(repr=False)
    label: str
    stability: str
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    uncertainty: Any = None
    rtol: float = classify.DEFAULT_RTOL
    warnings: tuple[str, ...] = ()
    diagnostics: tuple = ()

    # -- convenient views ---------------------------------------------------------
    @property
    def method(self) -> str:
        """Estimator name."""
        return self.estimate.method

    @property
    def matrix(self) -> np.ndarray:
        """The system matrix A."""
        return self.estimate.matrix

    @property
    def offset(self) -> np.ndarray:
        """``b`` of ``dx/dt = A x + b``."""
        return self.estimate.offset

    @property
    def equilibrium(self) -> np.ndarray | None:
        """The equilibrium x* (None when A is singular)."""
        return self.estimate.equilibrium

    @property
    def trace(self) -> float:
        """Trace of A."""
        return float(np.trace(self.matrix))

    @property
    def determinant(self) -> float:
        """Determinant of A."""
        return float(np.linalg.det(self.matrix))

    @property
    def discriminant(self) -> float:
        """``trace^2 - 4 det``."""
        return float(linalg2.invariants(self.matrix)[2])

    @property
    def time_constants(self) -> np.ndarray:
        """``1 / |Re lambda|`` for each eigenvalue (inf for a zero real part)."""
        re = np.abs(self.eigenvalues.real)
        with np.errstate(divide="ignore"):
            return np.where(re > 0, 1.0 / np.where(re > 0, re, 1.0), np.inf)

    @property
    def period(self) -> float | None:
        """``2 pi / |Im lambda|`` for a complex pair, else None."""
        im = abs(float(self.eigenvalues[0].imag))
        return 2 * np.pi / im if im > 0 else None

    @property
    def damping_ratio(self) -> float | None:
        """``-Re lambda / |lambda|`` for a complex pair, else None."""
        lam = self.eigenvalues[0]
        if lam.imag == 0 or abs(lam) == 0:
            return None
        return float(-lam.real / abs(lam))

    @property
    def p_stable(self) -> float | None:
        """Probability of stability from the uncertainty analysis, if any."""
        return None if self.uncertainty is None else float(self.uncertainty.p_stable)

    # -- fitted curves ------------------------------------------------------------
    @cached_property
    def _initial_states(self) -> np.ndarray:
        known = self.estimate.extra.get("initial_states")
        if known is not None:
            return np.asarray(known, dtype=float)
        rec = self.recording
        out = np.empty((rec.n_trajectories, 2))
        for k in range(rec.n_trajectories):
            m = rec.trajectory == k
            t = rec.times[m]
            E, p = self._propagators(t - t[0])
            # y_i = E_i x0 + p_i  ->  x0 by least squares over the samples
            lhs = np.einsum("nji,njk->ik", E, E)
            rhs = np.einsum("nji,nj->i", E, rec.values[m] - p)
            out[k] = np.linalg.lstsq(lhs, rhs, rcond=None)[0]
        return out

    def initial_states(self) -> np.ndarray:
        """Initial state of each trajectory under the fitted model, shape (R, 2).

        The trajectory estimator fits them; otherwise they are the least-squares
        initial states given the fitted A and b.
        """
        return self._initial_states.copy()

    def _propagators(self, tau: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``E(tau) = expm(A tau)`` and the offset response ``int_0^tau E(s) ds b``."""
        tau = np.asarray(tau, dtype=float)
        A = np.broadcast_to(self.matrix, (tau.size, 2, 2))
        E = linalg2.expm(A, tau)
        # int_0^tau expm(A s) ds = tau phi1(A tau): finite for singular A too
        p = np.einsum("nij,j->ni", linalg2.expm_integral(A, tau), self.offset)
        return E, p

    def fitted(self, times: np.ndarray | None = None, trajectory: int = 0) -> np.ndarray:
        """Fitted states of one trajectory at ``times`` (default: its sample times).

        Parameters
        ----------
        times : ndarray, optional
            Times in the recording's time unit.
        trajectory : int
            Trajectory code.

        Returns
        -------
        ndarray, shape (len(times), 2)
        """
        rec = self.recording
        m = rec.trajectory == trajectory
        t0 = rec.times[m][0]
        t = rec.times[m] if times is None else np.asarray(times, dtype=float)
        E, p = self._propagators(t - t0)
        x0 = self._initial_states[trajectory]
        return np.einsum("nij,j->ni", E, x0) + p

    def residuals(self) -> np.ndarray:
        """Data minus fitted curve at every sample, shape (n, 2)."""
        rec = self.recording
        out = np.empty_like(rec.values)
        for k in range(rec.n_trajectories):
            m = rec.trajectory == k
            out[m] = rec.values[m] - self.fitted(trajectory=k)
        return out

    # -- outputs --------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Machine-readable result (schema ``fitdyn/1``, documented in README)."""
        eq = None if self.equilibrium is None else [float(v) for v in self.equilibrium]
        rec = self.recording
        unc = None if self.uncertainty is None else self.uncertainty.to_dict()
        return {
            "schema": SCHEMA,
            "fitdyn_version": __version__,
            "source": rec.source,
            "method": self.method,
            "channels": list(rec.channels),
            "units": list(rec.units),
            "time_unit": rec.time_unit,
            "matrix": np.asarray(self.matrix, dtype=float).tolist(),
            "offset": np.asarray(self.offset, dtype=float).tolist(),
            "equilibrium": eq,
            "equilibrium_known": self.estimate.equilibrium_known,
            "eigenvalues": [[float(z.real), float(z.imag)] for z in self.eigenvalues],
            "eigenvectors": [
                [[float(z.real), float(z.imag)] for z in self.eigenvectors[:, k]] for k in range(2)
            ],
            "invariants": {
                "trace": self.trace,
                "determinant": self.determinant,
                "discriminant": self.discriminant,
            },
            "time_constants": [float(v) if np.isfinite(v) else None for v in self.time_constants],
            "period": self.period,
            "damping_ratio": self.damping_ratio,
            "classification": {
                "label": self.label,
                "stability": self.stability,
                "rtol": self.rtol,
            },
            "uncertainty": unc,
            "estimator": self.estimate.to_dict(),
            "cleaning": rec.describe(),
            "diagnostics": [d.to_dict() for d in self.diagnostics],
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }

    def to_json(self, path: str | os.PathLike | None = None, indent: int = 2) -> str:
        """JSON text of :meth:`to_dict`; written atomically to ``path`` when given."""
        text = json.dumps(self.to_dict(), indent=indent, allow_nan=False, default=_json_default)
        if path is not None:
            from fitdyn.atomic import write_text

            write_text(path, text + "\n")
        return text

    def _eig_rows(self) -> list[tuple[str, str, str, str]]:
        rows = []
        unc = self.uncertainty
        tu = f" {self.recording.time_unit}" if self.recording.time_unit else ""
        for k, lam in enumerate(self.eigenvalues):
            value = _fmt_complex(complex(lam))
            interval = ""
            if unc is not None:
                ivs = unc.intervals
                re = ivs.get("eigenvalue_real")
                im = ivs.get("eigenvalue_imag")
                if re is not None:
                    interval = f"re [{re[k][0]:.4g}, {re[k][1]:.4g}]"
                    if lam.imag != 0 and im is not None:
                        interval += f", im [{im[k][0]:.4g}, {im[k][1]:.4g}]"
            tc = self.time_constants[k]
            tcs = f"{tc:.4g}{tu}" if np.isfinite(tc) else "none (zero real part)"
            rows.append((f"lambda{k + 1}", value, interval, tcs))
        return rows

    def summary(self) -> str:
        """A plain-text table a person reads."""
        rec = self.recording
        c1, c2 = rec.channels
        w = max(10, len(c1), len(c2)) + 2
        unit = f" {rec.time_unit}" if rec.time_unit else ""
        lines = [f"fitdyn {__version__} -- linear fit near an equilibrium"]
        lines.append(f"  source          {rec.source}")
        chans = ", ".join(
            f"{c} [{u}]" if u else c for c, u in zip(rec.channels, rec.units, strict=True)
        )
        lines.append(f"  channels        {chans}")
        lines.append(
            f"  data            {rec.n_samples} samples in {rec.n_trajectories} "
            f"trajector{'y' if rec.n_trajectories == 1 else 'ies'}, "
            f"{rec.n_gaps} gap(s); time unit{unit or ' not given'}"
        )
        lines.append(f"  method          {self.method}")
        for note in self.estimate.notes:
            lines.append(f"                  {note}")
        lines.append("")
        lines.append("System matrix A  (dx/dt = A (x - x*); row i gives d(x_i)/dt)")
        cw = max(12, len(c1) + 2, len(c2) + 2)
        lines.append(" " * (w + 2) + f"{c1:>{cw}}{c2:>{cw}}")
        for i, name in enumerate((c1, c2)):
            row = "".join(_fmt(float(self.matrix[i, j]), cw) for j in range(2))
            lines.append(f"  {name:<{w}}{row}")
        if self.equilibrium is None:
            lines.append("Equilibrium x*   not unique (A is singular: a line of equilibria)")
        else:
            eq = ", ".join(
                f"{n} = {v:.6g}" for n, v in zip(rec.channels, self.equilibrium, strict=True)
            )
            tag = " (given)" if self.estimate.equilibrium_known else ""
            lines.append(f"Equilibrium x*   {eq}{tag}")
            if self.uncertainty is not None and "equilibrium" in self.uncertainty.intervals:
                ivs = self.uncertainty.intervals["equilibrium"]
                lines.append(
                    "                 "
                    + ", ".join(
                        f"{n} [{lo:.4g}, {hi:.4g}]"
                        for n, (lo, hi) in zip(rec.channels, ivs, strict=True)
                    )
                )
        lines.append(
            f"Invariants       trace {self.trace:.4g}, determinant {self.determinant:.4g}, "
            f"discriminant {self.discriminant:.4g}"
        )
        lines.append("")
        conf = ""
        if self.uncertainty is not None:
            conf = f"  ({100 * self.uncertainty.confidence:.0f} % intervals)"
        lines.append(f"Eigenvalues{conf}")
        rows = self._eig_rows()
        vw = max(len(r[1]) for r in rows) + 3
        iw = max(len(r[2]) for r in rows)
        iw = iw + 3 if iw else 0
        for name, value, interval, tc in rows:
            lines.append(f"  {name:<9}{value:<{vw}}{interval:<{iw}}time constant {tc}")
        for k in range(2):
            v = self.eigenvectors[:, k]
            vs = ", ".join(_fmt_complex(complex(z)) for z in v)
            lines.append(f"  v{k + 1}       ({vs})")
        if self.period is not None:
            lines.append(
                f"  period {self.period:.4g}{unit}, damping ratio {self.damping_ratio:.4g}"
            )
        lines.append("")
        verdict = self.label
        stab = self.stability
        if self.uncertainty is not None:
            probs = self.uncertainty.class_probabilities
            p_label = probs.get(self.label)
            if p_label is not None:
                verdict += f" (P = {p_label:.3g})"
            stab += f"; P(stable) = {self.uncertainty.p_stable:.3g}"
            cw = list(self.uncertainty.consistent_with)
            if cw:
                verdict += "; cannot exclude: " + ", ".join(cw)
        verdict, headline = self._diagnostics_verdict(verdict)
        if headline:
            lines.append(headline)
        lines.append(f"Equilibrium type {verdict}")
        lines.append(f"Stability        {stab}")
        if self.uncertainty is not None:
            u = self.uncertainty
            probs = ", ".join(f"{k} {v:.3g}" for k, v in u.class_probabilities.items() if v > 0)
            lines.append(f"Class probabilities  {probs}")
            lines.append(
                f"Uncertainty      {u.replicates} replicates, scheme {u.scheme}, seed {u.seed}"
            )
        lines.extend(self._diagnostics_lines())
        if self.warnings:
            lines.append("")
            lines.append("Warnings")
            for wmsg in self.warnings:
                lines.append(f"  - {wmsg}")
        lines.append("")
        lines.append("Caution: " + CAUTION)
        return "\n".join(lines)

    def _diagnostics_verdict(self, verdict: str) -> tuple[str, str | None]:
        """The verdict text with the identifiability caveat, and the unreliable headline."""
        from fitdyn.diagnostics import NON_ISOLATED, non_isolated_flag, unreliable_reason

        unc = self.uncertainty
        said = unc is not None and "non-isolated equilibria" in list(unc.consistent_with)
        if (
            self.label != "non-isolated equilibria"
            and not said
            and non_isolated_flag(self.diagnostics)
        ):
            verdict += f"; {NON_ISOLATED}"
        reason = unreliable_reason(self.diagnostics)
        headline = None if reason is None else f"NOT RELIABLE     {reason}"
        return verdict, headline

    def _diagnostics_lines(self) -> list[str]:
        """The "Checks" block of the summary: one line per adequacy check."""
        if not self.diagnostics:
            return []
        lines = ["", "Checks"]
        w = max(len(d.name) for d in self.diagnostics) + 2
        for d in self.diagnostics:
            stat = "" if d.statistic is None else f"{d.statistic:.3g}"
            thr = "" if d.threshold is None else f"(threshold {d.threshold:.3g})"
            note = "see Warnings" if d.verdict != "pass" else ""
            lines.append(f"  {d.name:<{w}}{d.verdict:<6}{stat:>10} {thr:<20}{note}".rstrip())
        return lines

    def __str__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        """Notebook view: the key numbers in a small table."""
        rec = self.recording
        esc = html.escape
        verdict, headline = self._diagnostics_verdict(self.label)
        rows = [
            ("method", esc(self.method)),
            ("channels", esc(", ".join(rec.channels))),
            ("type", esc(verdict)),
            ("stability", esc(self.stability)),
        ]
        if self.uncertainty is not None:
            rows.append(("P(stable)", f"{self.uncertainty.p_stable:.3g}"))
        for name, value, interval, tc in self._eig_rows():
            rows.append((name, esc(f"{value} {interval}; time constant {tc}")))
        mat = "<br>".join(" ".join(f"{self.matrix[i, j]:.4g}" for j in range(2)) for i in range(2))
        rows.insert(2, ("matrix A", mat))
        if self.equilibrium is not None:
            rows.insert(3, ("equilibrium", esc(", ".join(f"{v:.4g}" for v in self.equilibrium))))
        if headline:
            rows.insert(0, ("NOT RELIABLE", esc(headline.split(None, 2)[-1])))
        for d in self.diagnostics:
            rows.append((f"check: {esc(d.name)}", f"{esc(d.verdict)}: {esc(d.advice)}"))
        body = "".join(
            f"<tr><th style='text-align:left;padding-right:1em'>{k}</th><td>{v}</td></tr>"
            for k, v in rows
        )
        warn = "".join(f"<li>{esc(wm)}</li>" for wm in self.warnings)
        warn_html = f"<p><b>Warnings</b></p><ul>{warn}</ul>" if warn else ""
        return (
            f"<div class='fitdyn-fit'><p><b>fitdyn fit</b> of {esc(str(rec.source))}</p>"
            f"<table>{body}</table>{warn_html}<p style='font-size:smaller'>"
            f"{esc(CAUTION)}</p></div>"
        )

    def plot(self, kind: str = "phase", ax: Any = None, **kwargs: Any) -> Any:
        """Draw one figure (see :mod:`fitdyn.plots` for the kinds)."""
        from fitdyn import plots

        return plots.plot(self, kind, ax=ax, **kwargs)

    def report(self, folder: str | os.PathLike, **kwargs: Any) -> Any:
        """Write the self-contained report folder (see :mod:`fitdyn.report`)."""
        from fitdyn import report

        return report.write_report(self, folder, **kwargs)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _as_recording(data: Any, read_options: dict[str, Any]) -> Recording:
    if isinstance(data, Recording):
        return data
    from fitdyn.importer import read

    return read(data, **read_options)


def fit(
    data: Any,
    method: str = "auto",
    equilibrium: Any = "estimate",
    *,
    bootstrap: int = 0,
    confidence: float = 0.95,
    seed: int | None = None,
    scheme: str = "auto",
    interval: str = "percentile",
    bias_correction: bool | None = None,
    margin: float | None = None,
    asymptotic: bool = False,
    rtol: float = classify.DEFAULT_RTOL,
    settings: dict[str, Any] | None = None,
    quiet: bool = False,
    window: Any = None,
    **read_options: Any,
) -> Fit:
    """Estimate the linear dynamics of a recording and classify its equilibrium.

    Parameters
    ----------
    data : Recording, pandas.DataFrame, path or (t, X) tuple
        The data; anything but a Recording goes through :func:`fitdyn.read` with
        ``read_options``.
    method : str
        ``"auto"`` (default: chosen from the data, the reasons in the notes) or one
        of the registered estimators (:data:`fitdyn.estimators.METHODS`):
        ``"derivative"``, ``"integral"``, ``"discrete"``, ``"instrumental"``,
        ``"nonlinear-iv"``, ``"prediction"``, ``"kalman"``, ``"trajectory"``.
    equilibrium : "estimate" or array-like of 2 floats
        Estimate the equilibrium (default) or use a known one.
    bootstrap : int
        Number of bootstrap replicates (0: no intervals).
    confidence : float
        Confidence level of the intervals.
    seed : int, optional
        Seed of the random generator; the same seed gives the same numbers.
    scheme : str
        Resampling scheme (``"auto"`` picks one that suits the estimator).
    interval : str
        ``"percentile"`` (default) or ``"bca"``.
    bias_correction : bool, optional
        Bootstrap-after-bootstrap bias correction (default: the scheme's default).
    margin : float, optional
        Practical-equivalence margin that gives boundary classes probabilities.
    asymptotic : bool
        Use the fast delta-method intervals instead of the bootstrap.
    rtol : float
        Relative tolerance of the point label's boundary classes.
    settings : dict, optional
        Estimator settings (e.g. ``{"derivative": "spline"}``).
    quiet : bool
        No progress bar.
    window : str or tuple, optional
        Fit only part of the data: ``"amplitude:F"`` keeps, of each trajectory,
        the part after it last leaves the region within ``F`` (0 < F <= 1) of its
        largest distance from the equilibrium (a first fit on all data gives the
        equilibrium unless it is given); ``"time:START:END"`` keeps the samples in
        that time interval.  What the ``nonlinearity`` check advises when the
        motion is too large for a linearisation (see
        :func:`fitdyn.diagnostics.select_window`).
    **read_options
        Passed to :func:`fitdyn.read` (``time``, ``channels``, ``trajectory``...).

    Returns
    -------
    Fit
    """
    rec = _as_recording(data, read_options)
    if isinstance(equilibrium, str):
        if equilibrium != "estimate":
            from fitdyn.errors import FitdynError

            raise FitdynError(f"equilibrium must be 'estimate' or two numbers, got '{equilibrium}'")
        eq = None
    else:
        eq = np.asarray(equilibrium, dtype=float).reshape(2)
    from fitdyn import diagnostics

    if window is not None:
        centre = eq
        if centre is None and diagnostics.parse_window(window)[0] == "amplitude":
            _refuse_constant(rec)
            centre = estimate(rec, method, None, **(settings or {}))[0].equilibrium
        rec = diagnostics.select_window(rec, window, centre)
    _refuse_constant(rec)
    est, estimator = estimate(rec, method, eq, **(settings or {}))
    if not (np.all(np.isfinite(est.matrix)) and np.all(np.isfinite(est.offset))):
        from fitdyn.errors import EstimationError

        raise EstimationError(
            f"{rec.source}: the data do not determine the matrix with the "
            f"'{est.method}' method: the regressors are (nearly) collinear, as when "
            "every trajectory runs along one straight line (e.g. starts on an "
            "eigenvector) or the record is too short; record trajectories from "
            "several directions, or give the equilibrium with --equilibrium"
        )
    lam, vec = linalg2.eigvecs(est.matrix[None])
    label, stability = classify.classify(est.matrix, rtol)
    warnings = list(est.warnings)
    unc = None
    if asymptotic or bootstrap:
        from fitdyn import bootstrap as boot

        if asymptotic:
            unc = boot.asymptotic(rec, estimator, est, confidence=confidence, seed=seed)
        else:
            unc = boot.bootstrap(
                rec,
                estimator,
                est,
                replicates=int(bootstrap),
                confidence=confidence,
                seed=seed,
                scheme=scheme,
                method=interval,
                bias_correction=bias_correction,
                margin=margin,
                quiet=quiet,
            )
        warnings.extend(w for w in unc.warnings if w not in warnings)
    checks = diagnostics.check(rec, est, unc, label)
    warnings.extend(d.message for d in checks if d.verdict != "pass")
    return Fit(
        recording=rec,
        estimate=est,
        estimator=estimator,
        label=label,
        stability=stability,
        eigenvalues=lam[0],
        eigenvectors=vec[0],
        uncertainty=unc,
        rtol=rtol,
        warnings=tuple(warnings),
        diagnostics=checks,
    )


def _refuse_constant(rec: Recording) -> None:
    """Refuse a recording with a constant channel: it determines no class."""
    from fitdyn.diagnostics import constant_channel

    j = constant_channel(rec)
    if j is None:
        return
    from fitdyn.errors import EstimationError

    v = float(rec.values[0, j]) if rec.n_samples else float("nan")
    raise EstimationError(
        f"{rec.source}: column '{rec.channels[j]}' is constant (all {rec.n_samples} "
        f"samples equal {v:.6g}): a channel that never moves does not determine its "
        "row of A, so no class can be given; record data in which both channels vary"
    )
