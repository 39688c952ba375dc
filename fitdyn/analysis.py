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
import textwrap
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from fitdyn import __version__, classify, fmt, linalg2
from fitdyn.estimators import Estimate, Estimator, estimate
from fitdyn.recording import Recording

__all__ = ["Fit", "fit", "SCHEMA", "CAUTION", "DEFAULT_REPLICATES", "CALIBRATED_REPLICATES"]

SCHEMA = "fitdyn/1"

#: Bootstrap replicates of :func:`fit` and ``fitdyn fit`` unless told otherwise.
DEFAULT_REPLICATES = 1000

#: Fewest replicates at which benchmarks/coverage.py finds the default intervals
#: calibrated (coverage of nominal 95 % intervals within [0.93, 0.97] in every
#: scenario, see README); fewer get a warning.
CALIBRATED_REPLICATES = 500

CAUTION = (
    "These are statistical estimates about a linearisation near one equilibrium, made "
    "from noisy data; they say nothing about large disturbances or about behaviour far "
    "from the equilibrium. Decisions that affect safety, health or compliance defer to "
    "local codes and licensed practice."
)


def _items(prefix: str, items: list[str], width: int = 100) -> list[str]:
    """``items`` joined by commas after ``prefix``, broken between items only."""
    lines, cur = [], prefix
    for k, item in enumerate(items):
        piece = item + ("," if k < len(items) - 1 else "")
        if cur.strip() and len(cur) + 1 + len(piece) > width:
            lines.append(cur.rstrip())
            cur = " " * len(prefix)
        cur += ("" if cur.endswith(" ") else " ") + piece
    lines.append(cur.rstrip())
    return lines


def _wrap(prefix: str, text: str, indent: str | None = None, width: int = 100) -> list[str]:
    """``text`` wrapped after ``prefix``, continuation lines indented to match."""
    pad = " " * len(prefix) if indent is None else indent
    return textwrap.wrap(
        text, width=width, initial_indent=prefix, subsequent_indent=pad, break_on_hyphens=False
    ) or [prefix.rstrip()]


@dataclass(frozen=True, repr=False)
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
            "verdict": self.verdict.to_dict(),
            "estimator": self.estimate.to_dict(),
            "cleaning": rec.describe(),
            "diagnostics": [d.to_dict() for d in self.diagnostics],
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }

    def to_json(self, path: str | os.PathLike | None = None, indent: int = 2) -> str:
        """JSON text of :meth:`to_dict`; written atomically to ``path`` when given.

        Raises
        ------
        OutputError
            ``path`` is the recording's own input file, or is a folder or not a
            regular file (the command line's ``--json`` checks the same).
        """
        text = json.dumps(self.to_dict(), indent=indent, allow_nan=False, default=_json_default)
        if path is not None:
            from fitdyn.atomic import write_text
            from fitdyn.safety import check_outputs

            source = getattr(self.recording, "source", None)
            inputs = [source] if isinstance(source, str) and os.path.isfile(source) else []
            check_outputs([("to_json path", path)], inputs)
            write_text(path, text + "\n")
        return text

    # -- the verdict and the text a person reads ----------------------------------
    @property
    def verdict(self) -> Any:
        """The :class:`fitdyn.verdict.Verdict` at the fit's confidence level.

        ``"stable"`` / ``"unstable"`` / a class only when the uncertainty analysis
        supports it at the confidence level, otherwise ``"undetermined"`` with the
        candidates; without an uncertainty analysis it has no confidence attached
        (``confidence`` None). See :mod:`fitdyn.verdict`.
        """
        from fitdyn.verdict import verdict_of

        return verdict_of(self)

    def _ivs(self) -> dict[str, Any]:
        unc = self.uncertainty
        return {} if unc is None else dict(getattr(unc, "intervals", {}) or {})

    def _eig_rows(self) -> list[tuple[str, str, str]]:
        """``(name, value, intervals)`` of each eigenvalue, rounded to its intervals."""
        ivs = self._ivs()
        re = ivs.get("eigenvalue_real")
        im = ivs.get("eigenvalue_imag")
        rows = []
        for k, lam in enumerate(self.eigenvalues):
            lam = complex(lam)
            re_k = None if re is None else re[k]
            im_k = None if (im is None or lam.imag == 0) else im[k]
            value = fmt.complex_value(lam, re_k, im_k)
            interval = ""
            if re_k is not None:
                interval = f"Re {fmt.interval(re_k)}"
                if im_k is not None:
                    interval += f", Im {fmt.interval(im_k)}"
            rows.append((f"lambda{k + 1}", value, interval))
        return rows

    def _derived_rows(self) -> list[tuple[str, str]]:
        """Time constants, period and damping ratio with their intervals."""
        ivs = self._ivs()
        unc = self.uncertainty
        tu = self.recording.time_unit
        re = ivs.get("eigenvalue_real")
        tci = ivs.get("time_constants")
        tcs = [
            fmt.time_constant(
                float(t),
                None if tci is None else tci[k],
                None if re is None else re[k],
                tu,
            )
            for k, t in enumerate(self.time_constants)
        ]
        if self.eigenvalues[0].imag != 0 and tcs[0] == tcs[1]:
            rows = [("time constant", tcs[0])]
        else:
            rows = [("time constants", "; ".join(tcs))]
        frac = {} if unc is None else dict(getattr(unc, "defined_fraction", {}) or {})
        for key, name, value, unit in (
            ("period", "period", self.period, tu),
            ("damping_ratio", "damping ratio", self.damping_ratio, None),
        ):
            iv = ivs.get(key)
            if value is None:
                if iv is not None:
                    text = (
                        f"none by the point estimate (real eigenvalues); "
                        f"{fmt.interval(iv)}{' ' + unit if unit else ''} over the "
                        f"{100 * frac.get(key, 0.0):.0f} % of replicates with a complex pair"
                    )
                    rows.append((name, text))
                continue
            text = fmt.value_interval(value, iv, unit)
            f = frac.get(key)
            if iv is not None and f is not None and f < 0.995:
                text += f"  (over the {100 * f:.0f} % of replicates with a complex pair)"
            rows.append((name, text))
        return rows

    def _point_estimate_text(self) -> str:
        """Which matrix the numbers refer to (and what the other one is)."""
        unc = self.uncertainty
        text = (
            "the fitted A (JSON 'matrix'); the eigenvalues, time constants, period "
            "and equilibrium are its values."
        )
        if unc is None:
            return text + " No uncertainty analysis was run, so nothing has a confidence."
        if getattr(unc, "method", "") == "delta":
            what = "draws from the asymptotic (delta-method) distribution"
        else:
            what = f"{unc.scheme} bootstrap replicates"
        text += f" Verdict, probabilities and intervals: {unc.replicates} {what}"
        pm = np.asarray(getattr(unc, "point_matrix", np.full((2, 2), np.nan)), dtype=float)
        if not (getattr(unc, "bias_corrected", False) and np.all(np.isfinite(pm))):
            return text + "."
        if np.allclose(pm, self.matrix, rtol=1e-12, atol=0):
            return text + (
                ", bias-corrected; the correction was not applied to the point estimate "
                "(see the warnings)."
            )
        shown = "; ".join(", ".join(f"{v:.4g}" for v in row) for row in pm)
        text += (
            ", bias-corrected (bootstrap after bootstrap), so the intervals centre on the "
            f"bias-corrected A = [{shown}] (JSON 'uncertainty.point_matrix'): the fitted A "
            "minus its estimated small-sample bias, shown only to explain where the "
            "intervals lie."
        )
        re = self._ivs().get("eigenvalue_real")
        if re is not None and any(
            not (re[k][0] <= self.eigenvalues[k].real <= re[k][1]) for k in range(2)
        ):
            text += (
                " A point eigenvalue lies outside its interval: the estimator's bias is "
                "large compared with its spread here."
            )
        return text

    def summary(self, verbose: bool = False) -> str:
        """A plain-text report a person reads: the answer first.

        Parameters
        ----------
        verbose : bool
            Also list how the estimator and the resampling were chosen (the
            estimator's and the bootstrap's notes).

        Returns
        -------
        str
            The verdict at the confidence level, the eigenvalues with their intervals
            and the derived quantities first; then which matrix is the point estimate,
            the matrix, equilibrium and invariants (rounded to their intervals, in the
            recording's units), the data, the method and the warnings.
        """
        rec = self.recording
        unc = self.uncertainty
        ivs = self._ivs()
        v = self.verdict
        c1, c2 = rec.channels
        ru = fmt.rate_unit(rec.time_unit)
        src = rec.source or "in-memory data"
        lines = [f"fitdyn {__version__} -- linear fit near an equilibrium: {src}", ""]
        lines.extend(_wrap("Verdict          ", v.headline()))
        if v.not_reliable or not v.assessed or v.label == "undetermined":
            lines.extend(_wrap("Stability        ", v.stability_text()))
        head = "Eigenvalues"
        parts = [p for p in (ru, unc and f"{100 * unc.confidence:.0f} % intervals") if p]
        if parts:
            head += f"  ({', '.join(parts)})"
        lines.append("")
        lines.append(head)
        rows = self._eig_rows()
        vw = max(len(r[1]) for r in rows) + 3
        for name, value, interval in rows:
            lines.append(f"  {name:<15}{value:<{vw}}{interval}".rstrip())
        hints = {
            "time constant": "  (1/|Re lambda|, both eigenvalues)",
            "time constants": "  (1/|Re lambda1|; 1/|Re lambda2|)",
        }
        for name, text in self._derived_rows():
            hint = hints.get(name, "")
            if len(text) + len(hint) > 100 - 17 or fmt.INF in text:
                hint = ""
            lines.extend(_wrap(f"  {name:<15}", text + hint))
        lines.append("")
        lines.extend(_wrap("Point estimate   ", self._point_estimate_text()))
        lines.append("")
        head = "System matrix A"
        inside = "dx/dt = A (x - x*); row i gives d(x_i)/dt"
        lines.append(f"{head}  ({ru + '; ' if ru else ''}{inside})")
        mi = ivs.get("matrix")
        cells = [
            [
                fmt.value_interval(float(self.matrix[i, j]), None if mi is None else mi[i][j])
                for j in range(2)
            ]
            for i in range(2)
        ]
        w = max(10, len(c1), len(c2)) + 2
        cw = max(12, len(c1) + 2, len(c2) + 2, *(len(x) + 3 for r in cells for x in r))
        lines.append(" " * (w + 2) + f"{c1:>{cw}}{c2:>{cw}}")
        for i, name in enumerate((c1, c2)):
            lines.append(f"  {name:<{w}}" + "".join(f"{x:>{cw}}" for x in cells[i]))
        if self.equilibrium is None:
            lines.append("Equilibrium x*   not unique (A is singular: a line of equilibria)")
        else:
            eqi = ivs.get("equilibrium")
            eq = ", ".join(
                f"{n} = "
                + fmt.value_interval(float(val), None if eqi is None else eqi[j], rec.units[j])
                for j, (n, val) in enumerate(zip(rec.channels, self.equilibrium, strict=True))
            )
            tag = " (given, not estimated)" if self.estimate.equilibrium_known else ""
            lines.append(f"Equilibrium x*   {eq}{tag}")
        inv = [
            f"{name} {fmt.value_interval(val, ivs.get(name))}"
            for name, val in (
                ("trace", self.trace),
                ("determinant", self.determinant),
                ("discriminant", self.discriminant),
            )
        ]
        lines.extend(_items("Invariants       ", inv))
        vecs = [
            f"v{k + 1} ("
            + ", ".join(fmt.complex_value(complex(z)) for z in self.eigenvectors[:, k])
            + ")"
            for k in range(2)
        ]
        lines.extend(_items("Eigenvectors     ", [*vecs[:1], vecs[1] + " (point estimate)"]))
        if unc is not None:
            probs = ", ".join(
                f"{k} {fmt.prob(p)}"
                for k, p in sorted(unc.class_probabilities.items(), key=lambda kv: -kv[1])
                if p > 0
            )
            lines.append(f"Class probabilities  {probs}")
            cw_ = list(getattr(unc, "consistent_with", []) or [])
            if cw_:
                lines.append(f"Cannot exclude   {', '.join(cw_)} (boundary classes)")
            what = "draws" if getattr(unc, "method", "") == "delta" else "replicates"
            lines.append(
                f"Uncertainty      {unc.replicates} {what}, scheme {unc.scheme}, "
                f"{getattr(unc, 'method', 'percentile')} intervals, seed {unc.seed}"
                + ("; bias-corrected" if getattr(unc, "bias_corrected", False) else "")
            )
        lines.append("")
        chans = ", ".join(
            fmt.with_unit(c, u and f"[{u}]") for c, u in zip(rec.channels, rec.units, strict=True)
        )
        data_text = (
            f"{rec.n_samples} samples in {rec.n_trajectories} "
            f"trajector{'y' if rec.n_trajectories == 1 else 'ies'}, {rec.n_gaps} gap(s); "
            f"channels {chans}; time unit {rec.time_unit or 'not given'}"
        )
        lines.extend(_wrap("Data             ", data_text))
        chosen = any(str(n).startswith("auto:") for n in self.estimate.notes)
        how = "chosen automatically from the data" if chosen else "as asked"
        more = "the reasons" if chosen else "the estimator's notes"
        method_text = f"{self.method}, {how}" + (
            "" if verbose else f" ({more}: --verbose, or summary(verbose=True))"
        )
        lines.extend(_wrap("Method           ", method_text))
        lines.extend(self._diagnostics_lines())
        if self.warnings:
            lines.append("")
            lines.append("Warnings")
            for wmsg in self.warnings:
                lines.extend(_wrap("  - ", str(wmsg), "    "))
        if verbose:
            notes = list(self.estimate.notes) + list(getattr(unc, "notes", ()) or ())
            if notes:
                lines.append("")
                lines.append("How the estimate was made")
                for note in notes:
                    lines.extend(_wrap("  - ", str(note), "    "))
        lines.append("")
        lines.extend(_wrap("Caution: ", CAUTION, ""))
        return "\n".join(lines)

    def _diagnostics_lines(self) -> list[str]:
        """The "Checks" block of the summary: one line per adequacy check."""
        if not self.diagnostics:
            return []
        lines = ["", "Checks"]
        w = max(len(d.name) for d in self.diagnostics) + 2
        from fitdyn.diagnostics import describe_statistic

        for d in self.diagnostics:
            note = "; see Warnings" if d.verdict != "pass" else ""
            lines.append(f"  {d.name:<{w}}{d.verdict:<6}{describe_statistic(d)}{note}".rstrip())
        return lines

    def __str__(self) -> str:
        return self.summary()

    def __repr__(self) -> str:
        rec = self.recording
        v = self.verdict
        unc = self.uncertainty
        extra = ""
        if unc is not None:
            extra = f", P(stable)={fmt.prob(unc.p_stable)}, {unc.replicates} replicates"
        label = v.label if v.assessed else f"{self.label} (point estimate)"
        return (
            f"<Fit {rec.source or 'in-memory data'}: {self.method}, {label}, "
            f"stability {v.stability}{extra}>"
        )

    def _repr_html_(self) -> str:
        """Notebook view: the verdict first, then the key numbers with intervals and units."""
        rec = self.recording
        esc = html.escape
        v = self.verdict
        ivs = self._ivs()
        ru = fmt.rate_unit(rec.time_unit)
        colour = {"stable": "#2e7d4f", "unstable": "#b3402a"}.get(v.tone, "#777777")
        weight = "bold" if v.tone != "neutral" else "normal"
        head = (
            f"<p style='border-left:4px solid {colour};padding-left:0.6em;"
            f"font-weight:{weight}' class='fitdyn-verdict {v.tone}'>{esc(v.headline())}</p>"
        )
        rows: list[tuple[str, str]] = []
        if v.assessed and v.label == "undetermined":
            rows.append(("stability", esc(v.stability_text())))
        for name, value, interval in self._eig_rows():
            cell = esc(fmt.with_unit(value, ru))
            rows.append((name, cell + (f" &nbsp; {esc(interval)}" if interval else "")))
        for name, text in self._derived_rows():
            rows.append((name, esc(text)))
        mi = ivs.get("matrix")
        mat = "<br>".join(
            " &nbsp; ".join(
                esc(fmt.value_interval(float(self.matrix[i, j]), None if mi is None else mi[i][j]))
                for j in range(2)
            )
            for i in range(2)
        )
        rows.append((f"matrix A{' (' + ru + ')' if ru else ''}", mat))
        if self.equilibrium is not None:
            eqi = ivs.get("equilibrium")
            rows.append(
                (
                    "equilibrium x*",
                    esc(
                        ", ".join(
                            f"{n} = "
                            + fmt.value_interval(
                                float(val), None if eqi is None else eqi[j], rec.units[j]
                            )
                            for j, (n, val) in enumerate(
                                zip(rec.channels, self.equilibrium, strict=True)
                            )
                        )
                    ),
                )
            )
        rows.append(("method", esc(self.method)))
        rows.append(("point estimate", esc(self._point_estimate_text())))
        for d in self.diagnostics:
            rows.append((f"check: {d.name}", f"{esc(d.verdict)}: {esc(d.advice)}"))
        body = "".join(
            f"<tr><th style='text-align:left;padding-right:1em'>{esc(k)}</th><td>{val}</td></tr>"
            for k, val in rows
        )
        warn = "".join(f"<li>{esc(wm)}</li>" for wm in self.warnings)
        warn_html = f"<p><b>Warnings</b></p><ul>{warn}</ul>" if warn else ""
        return (
            f"<div class='fitdyn-fit'><p>fitdyn fit of {esc(str(rec.source))}</p>{head}"
            f"<table>{body}</table>{warn_html}<p style='font-size:smaller'>"
            f"{esc(CAUTION)}</p></div>"
        )

    def plot(self, kind: str = "phase", ax: Any = None, **kwargs: Any) -> Any:
        """Draw one figure (see :mod:`fitdyn.plots` for the kinds).

        Returns
        -------
        matplotlib.figure.Figure
            The same type for every kind: the Figure drawn on (its panels are
            ``fig.axes``).
        """
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
    bootstrap: int = DEFAULT_REPLICATES,
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
        Number of bootstrap replicates; 0 skips the uncertainty analysis (no
        intervals, and a verdict with no confidence attached).  Default 1000:
        benchmarks/coverage.py finds the default intervals calibrated (coverage of
        nominal 95 % intervals within [0.93, 0.97]) from 500 replicates on, so fewer
        than 500 (but more than 0) get a warning.  The output-error (trajectory) fit
        refits every replicate and is the slow case.
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
    from fitdyn.safety import check_fit_args, check_scale, numerical_guard

    eq = check_fit_args(equilibrium, bootstrap, confidence, seed, margin, rtol)
    rec = _as_recording(data, read_options)
    check_scale(rec)
    from fitdyn import diagnostics

    if window is not None:
        centre = eq
        if centre is None and diagnostics.parse_window(window)[0] == "amplitude":
            _refuse_constant(rec)
            with numerical_guard(rec.source, method):
                centre = estimate(rec, method, None, **(settings or {}))[0].equilibrium
        rec = diagnostics.select_window(rec, window, centre)
    _refuse_constant(rec)
    with numerical_guard(rec.source, method):
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
    if not (np.all(np.isfinite(lam)) and np.all(np.isfinite(vec))):
        from fitdyn.errors import EstimationError

        raise EstimationError(
            f"{rec.source}: the eigenvalues of the fitted matrix cannot be computed in "
            "floating point (the entries are too large or too small); rescale the "
            "channels or the time unit"
        )
    label, stability = classify.classify(est.matrix, rtol)
    warnings = list(est.warnings)
    if 0 < int(bootstrap) < CALIBRATED_REPLICATES and not asymptotic:
        warnings.append(
            f"only {int(bootstrap)} bootstrap replicates: the intervals are calibrated from "
            f"{CALIBRATED_REPLICATES} on (benchmarks/coverage.py); with fewer they tend to be "
            f"too narrow; use at least {CALIBRATED_REPLICATES} (the default is "
            f"{DEFAULT_REPLICATES})"
        )
    unc = None
    if asymptotic or bootstrap:
        from fitdyn import bootstrap as boot

        with numerical_guard(rec.source, est.method, "the intervals"):
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
