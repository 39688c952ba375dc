"""The self-contained report folder of a fit.

:func:`write_report` writes, atomically (the folder is built in a temporary sibling
and swapped in only when everything succeeded, so a failed run leaves an earlier
report untouched):

``index.html``
    One page with the estimates, the cleaning log, the warnings, the figures
    (embedded as PNG data URIs), a methods paragraph and the cautions.  It loads
    nothing from anywhere: no fonts, scripts or style sheets from the network (a
    Content-Security-Policy in the page forbids it too).
``figure-<kind>.png`` / ``figure-<kind>.svg``
    Each figure of :data:`fitdyn.plots.KINDS` in the requested formats.
``result.json``
    :meth:`fitdyn.analysis.Fit.to_json` (schema ``fitdyn/1``).
``cleaned.csv``
    The cleaned samples (:meth:`fitdyn.recording.Recording.to_frame`).

The page is rendered by Jinja2 with autoescaping on, so every user-supplied string
(file, column, unit and trajectory names, notes) reaches the page as text, never as
markup.
"""

from __future__ import annotations

import base64
import datetime as _dt
import io
import os
from pathlib import Path
from typing import Any

import numpy as np

from fitdyn import __version__, fmt
from fitdyn.atomic import replace_dir, write_bytes, write_csv_frame, write_text
from fitdyn.errors import ReportError
from fitdyn.verdict import a_label, join_labels

__all__ = ["write_report", "render_html", "methods_text", "FORMATS", "CAUTIONS"]

_TEMPLATES = Path(__file__).with_name("templates")

#: File formats :func:`write_report` can write for each figure.
FORMATS: tuple[str, ...] = ("png", "svg", "pdf")

#: The cautions every report ends with.
CAUTIONS: tuple[str, ...] = (
    "These numbers are statistical estimates, made from noisy data, of a linear model "
    "(a linearisation) of the dynamics near one equilibrium.",
    "They say nothing about large disturbances or about behaviour far from that "
    "equilibrium, where the real system may be nonlinear, have other equilibria or "
    "change with time.",
    "Intervals and probabilities hold under the model and the resampling scheme named "
    "in the methods; a model that does not fit (see the residual figure and the "
    "warnings) makes them too narrow.",
    "Decisions that affect safety, health or compliance defer to local codes and "
    "licensed practice.",
)

_TITLES = {
    "phase": "Phase plane",
    "series": "Time courses and residuals",
    "eigen": "Eigenvalues",
    "tracedet": "Trace-determinant plane",
    "residuals": "Residual autocorrelation",
}


# ----------------------------------------------------------------------------------
# number formatting
# ----------------------------------------------------------------------------------
def _num(v: Any, digits: int = 4) -> str:
    if v is None:
        return "-"
    v = float(v)
    if not np.isfinite(v):
        return "inf" if v > 0 else ("-inf" if v < 0 else "-")
    return f"{v:.{digits}g}"


def _unit(name: str, unit: str | None) -> str:
    return f"{name} [{unit}]" if unit else name


def _intervals(fit: Any) -> dict[str, Any]:
    unc = fit.uncertainty
    return {} if unc is None else dict(getattr(unc, "intervals", {}) or {})


# ----------------------------------------------------------------------------------
# page content
# ----------------------------------------------------------------------------------
def _verdict(fit: Any) -> list[dict[str, str]]:
    """The cards at the top: the verdict, stability, eigenvalues.

    A card is coloured (and its value bold) only when the verdict was decided at the
    confidence level; undetermined, unassessed or not-reliable verdicts get the
    neutral card.
    """
    v = fit.verdict
    tone = v.tone
    cells = []
    if v.not_reliable:
        value, sub = "not reliable", v.headline().removeprefix("not reliable: ")
    elif not v.assessed:
        value, sub = fit.label, "point estimate only: no uncertainty analysis (bootstrap 0)"
        if v.cannot_exclude:
            sub += "; cannot exclude " + join_labels([a_label(c) for c in v.cannot_exclude])
    elif v.label != "undetermined":
        value = v.label
        sub = f"P = {fmt.prob(v.probabilities.get(v.label))} at the " + (
            f"{100 * float(v.confidence):.0f} % level over {fit.uncertainty.replicates} replicates"
        )
        if v.cannot_exclude:
            sub += "; cannot exclude " + join_labels([a_label(c) for c in v.cannot_exclude])
    else:
        value = "undetermined"
        sub = v.class_text().removeprefix("undetermined: ")
    cells.append({"what": "verdict", "value": value, "sub": sub, "tone": tone})
    if v.not_reliable:
        stab, sub = "not reliable", f"the linear fit alone reads: {v.stability_text()}"
    elif not v.assessed:
        stab, sub = "not assessed", f"the point estimate is {fit.stability}"
    elif v.stability == "stable":
        stab, sub = "asymptotically stable", f"P(stable) = {fmt.prob(v.p_stable)}"
    elif v.stability == "unstable":
        stab, sub = "unstable", f"P(unstable) = {fmt.prob(v.p_unstable)}"
    else:
        stab = "undetermined"
        sub = f"P(stable) = {fmt.prob(v.p_stable)}, P(unstable) = {fmt.prob(v.p_unstable)}"
    cells.append({"what": "stability", "value": stab, "sub": sub, "tone": tone})
    ru = _rate_unit(fit)
    rows = fit._eig_rows()
    if fit.eigenvalues[0].imag != 0:  # a complex pair: one of them says it all
        values = [rows[0][1].replace(" + ", " ± ").replace(" - ", " ± ", 1)]
        intervals = [rows[0][2].replace("Im [", "|Im| [")] if rows[0][2] else []
    else:
        values = [value for _, value, _ in rows]
        intervals = [f"λ{k + 1}: {iv}" for k, (_, _, iv) in enumerate(rows) if iv]
    sub = "; ".join(intervals)
    if ru:
        sub = (f"in {ru}; " + sub) if sub else f"in {ru}"
    cells.append({"what": "eigenvalues", "value": ", ".join(values), "sub": sub, "tone": ""})
    return cells


def _diagnostics_context(fit: Any) -> tuple[str | None, list[dict[str, str]]]:
    """The not-reliable reason (or None) and the rows of the checks table."""
    from fitdyn.diagnostics import STATISTICS, unreliable_reason

    diags = tuple(getattr(fit, "diagnostics", ()) or ())
    rows = [
        {
            "name": d.name,
            "verdict": d.verdict,
            "statistic": (
                ""
                if d.statistic is None
                else f"{STATISTICS.get(d.name, ('',))[0]} {d.statistic:.3g}"
            ),
            "threshold": (
                ""
                if d.threshold is None
                else f"{'fails' if d.verdict == 'fail' else 'warns'} "
                f"{STATISTICS.get(d.name, ('', 'beyond'))[1]} {d.threshold:.3g}"
            ),
            "advice": d.advice,
        }
        for d in diags
    ]
    return unreliable_reason(diags), rows


def _rate_unit(fit: Any) -> str:
    tu = fit.recording.time_unit
    return f"1/{tu}" if tu else ""


def _matrix(fit: Any) -> dict[str, Any]:
    rec = fit.recording
    ivs = _intervals(fit).get("matrix")
    rows = []
    for i in range(2):
        cells = []
        for j in range(2):
            iv = None
            if ivs is not None:
                try:
                    iv = ivs[i][j]
                except (IndexError, TypeError, KeyError):
                    iv = None
            dec = None if iv is None else fmt.decimals(*iv)
            cells.append(
                {"value": fmt.num(fit.matrix[i, j], dec), "interval": fmt.interval(iv, dec)}
            )
        rows.append({"name": f"d({rec.channels[i]})/dt", "cells": cells})
    return {"columns": list(rec.channels), "rows": rows, "unit": _rate_unit(fit)}


def _summary_rows(fit: Any) -> list[dict[str, str]]:
    """The rows of the estimates table, every value rounded to its interval."""
    rec = fit.recording
    ivs = _intervals(fit)
    unc = fit.uncertainty
    v = fit.verdict
    rows: list[dict[str, str]] = []
    rows.append({"name": "Verdict", "value": v.headline()})
    if v.assessed and v.label == "undetermined" and not v.not_reliable:
        rows.append({"name": "Stability", "value": v.stability_text()})
    ru = _rate_unit(fit)
    re_iv = ivs.get("eigenvalue_real")
    im_iv = ivs.get("eigenvalue_imag")
    for k, (_, value, _) in enumerate(fit._eig_rows()):
        lam = complex(fit.eigenvalues[k])
        parts = []
        if re_iv is not None:
            parts.append(f"real part {fmt.interval(re_iv[k])}")
            if lam.imag != 0 and im_iv is not None:
                parts.append(f"imaginary part {fmt.interval(im_iv[k])}")
        rows.append(
            {
                "name": f"Eigenvalue λ{k + 1}",
                "value": fmt.with_unit(value, ru),
                "interval": "; ".join(parts),
            }
        )
    if "max_real_part" in ivs:
        iv = ivs["max_real_part"]
        rows.append(
            {
                "name": "Largest real part",
                "value": fmt.with_unit(
                    fmt.num(max(z.real for z in fit.eigenvalues), fmt.decimals(*iv)), ru
                ),
                "interval": fmt.interval(iv),
            }
        )
    derived_names = {
        "time constant": "Time constant 1/|Re λ|",
        "time constants": "Time constants 1/|Re λ|",
        "period": "Period 2π/|Im λ|",
        "damping ratio": "Damping ratio −Re λ/|λ|",
    }
    shown = set()
    for name, text in fit._derived_rows():
        shown.add(name)
        text = text.replace("lambda", "λ")
        rows.append({"name": derived_names.get(name, name), "value": text})
    if "period" not in shown:
        rows.append({"name": "Period 2π/|Im λ|", "value": "none (real eigenvalues)"})
    if "damping ratio" not in shown:
        rows.append({"name": "Damping ratio −Re λ/|λ|", "value": "none (real eigenvalues)"})
    if fit.equilibrium is None:
        rows.append(
            {
                "name": "Equilibrium x*",
                "value": "not unique",
                "note": "A is singular: a line of equilibria",
            }
        )
    else:
        tag = " (given, not estimated)" if fit.estimate.equilibrium_known else ""
        eq_iv = ivs.get("equilibrium")
        for j in range(2):
            iv = eq_iv[j] if eq_iv is not None else None
            dec = None if iv is None else fmt.decimals(*iv)
            rows.append(
                {
                    "name": f"Equilibrium {rec.channels[j]}*",
                    "value": fmt.with_unit(fmt.num(fit.equilibrium[j], dec), rec.units[j]) + tag,
                    "interval": fmt.interval(iv, dec),
                }
            )
    for key, name, value in (
        ("trace", "Trace τ", fit.trace),
        ("determinant", "Determinant Δ", fit.determinant),
        ("discriminant", "Discriminant τ² − 4Δ", fit.discriminant),
    ):
        iv = ivs.get(key)
        dec = None if iv is None else fmt.decimals(*iv)
        rows.append({"name": name, "value": fmt.num(value, dec), "interval": fmt.interval(iv)})
    if unc is not None:
        probs = dict(unc.class_probabilities)
        listed = ", ".join(
            f"{k} {fmt.prob(p)}" for k, p in sorted(probs.items(), key=lambda kv: -kv[1]) if p > 0
        )
        rows.append({"name": "Class probabilities", "value": listed or "-"})
        cw = list(getattr(unc, "consistent_with", []) or [])
        if cw:
            rows.append(
                {
                    "name": "Cannot exclude",
                    "value": ", ".join(cw),
                    "note": "boundary classes inside the intervals (they have no probability "
                    "of their own)",
                }
            )
        failed = int(getattr(unc, "failed_replicates", 0) or 0)
        upper = float(getattr(unc, "p_stable_upper", float("nan")))
        if failed and np.isfinite(upper):
            rows.append(
                {
                    "name": "Failed replicates",
                    "value": str(failed),
                    "note": f"counting them as stable would give P(stable) = {fmt.prob(upper)}",
                }
            )
    rows.append(
        {
            "name": "Point label",
            "value": f"{fit.label} ({fit.stability})",
            "note": "the class of the point estimate alone, without its uncertainty",
        }
    )
    mprobs = getattr(unc, "margin_probabilities", None) if unc is not None else None
    if mprobs:
        listed = ", ".join(
            f"{k} {fmt.prob(p)}" for k, p in sorted(mprobs.items(), key=lambda kv: -kv[1]) if p > 0
        )
        rows.append(
            {
                "name": "Within the margin",
                "value": listed,
                "note": f"class probabilities with the practical-equivalence margin "
                f"{_num(getattr(unc, 'margin', None))}",
            }
        )
    rows.append({"name": "Point estimate", "value": fit._point_estimate_text()})
    if unc is not None:
        what = "draws" if getattr(unc, "method", "") == "delta" else "replicates"
        rows.append(
            {
                "name": "Uncertainty",
                "value": f"{unc.replicates} {what}, scheme {unc.scheme}, "
                f"{100 * float(unc.confidence):.0f} % {getattr(unc, 'method', 'percentile')} "
                f"intervals, seed {unc.seed}"
                + ("; bias-corrected" if getattr(unc, "bias_corrected", False) else ""),
            }
        )
    return [{"interval": "", "note": "", **r} for r in rows]


def _data_rows(fit: Any) -> list[tuple[str, str]]:
    rec = fit.recording
    s = rec.sampling()
    tu = f" {rec.time_unit}" if rec.time_unit else ""
    names = ", ".join(rec.trajectory_names)
    if len(names) > 300:
        names = names[:300] + " ..."
    rows = [
        ("Source", str(rec.source)),
        ("Channels", ", ".join(_unit(c, u) for c, u in zip(rec.channels, rec.units, strict=True))),
        ("Time unit", rec.time_unit or "not given"),
        ("Samples", str(rec.n_samples)),
        ("Trajectories", f"{rec.n_trajectories} (named {names})"),
        ("Gaps", str(rec.n_gaps)),
        (
            "Sampling",
            ("uniform" if s["uniform"] else "irregular")
            + f", median step {_num(s['median_step'])}{tu}"
            + f" (from {_num(s['min_step'])} to {_num(s['max_step'])}{tu})",
        ),
        ("Time span", f"{_num(rec.time_span())}{tu}"),
    ]
    if rec.time_origin:
        rows.append(("Time origin", str(rec.time_origin)))
    return rows


def _cleaning_rows(fit: Any) -> list[tuple[str, str]]:
    log = fit.recording.log
    rows = [
        ("Input rows", str(log.input_rows)),
        ("Kept", str(log.kept_rows)),
        ("Merged (repeated timestamps)", str(log.merged_rows)),
        ("Dropped", str(log.dropped_rows)),
    ]
    for reason, n in sorted(log.dropped().items(), key=lambda kv: str(kv[0])):
        rows.append((f"  dropped: {reason}", str(n)))
    for flag, n in sorted(log.flagged().items()):
        rows.append((f"Flagged {flag} (kept)", str(n)))
    return rows


# ----------------------------------------------------------------------------------
# methods paragraph
# ----------------------------------------------------------------------------------
_REFS = {
    "savgol": "Savitzky, A. & Golay, M. J. E. (1964). Smoothing and differentiation of data "
    "by simplified least squares procedures. Analytical Chemistry 36, 1627-1639.",
    "gcv": "Craven, P. & Wahba, G. (1979). Smoothing noisy data with spline functions. "
    "Numerische Mathematik 31, 377-403.",
    "lutkepohl": "Lütkepohl, H. (2005). New Introduction to Multiple Time Series Analysis. "
    "Springer.",
    "higham": "Higham, N. J. (2008). Functions of Matrices: Theory and Computation. SIAM.",
    "ljung": "Ljung, L. (1999). System Identification: Theory for the User, 2nd ed. Prentice Hall.",
    "efron": "Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap. "
    "Chapman & Hall.",
    "kunsch": "Künsch, H. R. (1989). The jackknife and the bootstrap for general stationary "
    "observations. Annals of Statistics 17, 1217-1241.",
    "bca": "Efron, B. (1987). Better bootstrap confidence intervals. Journal of the "
    "American Statistical Association 82, 171-185.",
    "kilian": "Kilian, L. (1998). Small-sample confidence intervals for impulse response "
    "functions. Review of Economics and Statistics 80, 218-230.",
    "strogatz": "Strogatz, S. H. (2015). Nonlinear Dynamics and Chaos, 2nd ed. Westview "
    "Press, section 5.2.",
    "ljungbox": "Ljung, G. M. & Box, G. E. P. (1978). On a measure of lack of fit in time "
    "series models. Biometrika 65, 297-303.",
    "hampel": "Hampel, F. R. (1974). The influence curve and its role in robust "
    "estimation. Journal of the American Statistical Association 69, 383-393.",
}

_DERIVATIVE_WORDS = {
    "fd": "second-order three-point finite differences (valid for unequal spacing)",
    "savgol": "a Savitzky–Golay filter (Savitzky & Golay, 1964){window}",
    "spline": "smoothing splines with the smoothing chosen by generalized cross-validation "
    "(Craven & Wahba, 1979)",
}


def _derivative_sentence(est: Any, refs: list[str]) -> str:
    s = est.settings
    used = str(s.get("derivative") or "savgol").split("+")
    window = ""
    if s.get("window"):
        window = f", window {s['window']} samples, polynomial order {s.get('polyorder', '')}"
    words = []
    for kind in used:
        text = _DERIVATIVE_WORDS.get(kind, f"the '{kind}' rule")
        words.append(text.format(window=window))
        refs.extend({"savgol": ["savgol"], "spline": ["gcv"]}.get(kind, []))
    how = (
        " and, on segments too short or irregular for it, ".join(words)
        if len(words) > 1
        else words[0]
    )
    states = "smoothed states" if s.get("smooth_states") else "measured states"
    return (
        f"Time derivatives were estimated at the samples by {how}, and regressed on the "
        f"{states} by ordinary least squares (derivative regression)."
    )


def _estimator_sentence(fit: Any, refs: list[str]) -> str:
    est = fit.estimate
    m = est.method
    if m == "derivative":
        text = _derivative_sentence(est, refs)
    elif m == "integral":
        text = (
            "The integral form of the model, x(t) − x(t0) = A ∫ x dt + b (t − t0), was "
            "fitted by ordinary least squares, with running trapezoid-rule integrals and one "
            "intercept per gap-free segment; this avoids differentiating noisy data "
            "(integral regression)."
        )
    elif m == "discrete":
        refs.extend(["lutkepohl", "higham"])
        text = (
            "A one-step regression x(k+1) = F x(k) + g, a first-order vector autoregression "
            "with constant (Lütkepohl, 2005), was fitted by least squares to consecutive "
            "samples within gap-free segments, and A was recovered as the principal matrix "
            "logarithm of F divided by the sampling step (Higham, 2008)."
        )
    elif m == "trajectory":
        refs.append("ljung")
        text = (
            "The solution x(t) = x* + exp(A (t − t0)) (x0 − x*) of the model was fitted to "
            "the measured states by nonlinear least squares (an output-error fit; Ljung, "
            "1999), with A and x* shared by all trajectories and one initial state per "
            "trajectory, by a batched Levenberg–Marquardt solver with closed-form "
            "derivatives of the 2×2 matrix exponential (the initial states and the "
            "equilibrium solved linearly at each step: variable projection)."
        )
    else:
        text = f"The system matrix was estimated with the '{m}' estimator."
    if est.equilibrium_known:
        text += " The equilibrium was fixed at the given value, not estimated."
    return text


_SCHEME_WORDS = {
    "residual": (
        "a recursive residual bootstrap that regenerates every gap-free segment from its "
        "first sample with resampled residuals",
        ["efron"],
    ),
    "blocks": (
        "a moving-block bootstrap of the regression rows within gap-free segments (Künsch, 1989)",
        ["efron", "kunsch"],
    ),
    "parametric": (
        "a parametric bootstrap that simulates new recordings from the fitted model "
        "with the estimated noise and refits them",
        ["efron"],
    ),
    "cases": ("a case bootstrap that resamples whole trajectories", ["efron"]),
    "asymptotic": (
        "delta-method (asymptotic normal) approximations from the estimator's "
        "parameter covariance, drawn as a normal cloud",
        [],
    ),
}

_SCHEME_ALIASES = {
    "moving-block": "blocks",
    "moving_block": "blocks",
    "block": "blocks",
    "mbb": "blocks",
    "recursive": "residual",
    "residuals": "residual",
    "recursive-residual": "residual",
    "case": "cases",
    "trajectories": "cases",
    "delta": "asymptotic",
}


def _uncertainty_sentences(fit: Any, refs: list[str]) -> list[str]:
    unc = fit.uncertainty
    if unc is None:
        return [
            "No resampling was done, so the report gives no intervals or class "
            "probabilities; rerun with bootstrap replicates for them."
        ]
    scheme = str(unc.scheme)
    key = "asymptotic" if scheme.startswith("asymptotic") else _SCHEME_ALIASES.get(scheme, scheme)
    words, r = _SCHEME_WORDS.get(key, (f"the '{scheme}' resampling scheme", ["efron"]))
    refs.extend(r)
    conf = f"{100 * float(unc.confidence):.0f} %"
    interval = str(getattr(unc, "method", "percentile") or "percentile")
    out = []
    if key == "asymptotic" or interval == "delta":
        out.append(
            f"Uncertainty was assessed by {words} ({unc.replicates} draws, random seed "
            f"{unc.seed}); {conf} intervals are reported."
        )
    else:
        if interval.lower() == "bca":
            refs.append("bca")
            iv_words = "bias-corrected and accelerated (BCa; Efron, 1987)"
        else:
            iv_words = "percentile"
        out.append(
            f"Uncertainty was assessed with {unc.replicates} bootstrap replicates (Efron & "
            f"Tibshirani, 1993) from {words}, with random seed {unc.seed}; {iv_words} {conf} "
            "intervals are "
            "reported. Every replicate was kept, whether stable or not."
        )
    if getattr(unc, "bias_corrected", False):
        refs.append("kilian")
        out.append(
            "The estimates were bias-corrected by the bootstrap-after-bootstrap method "
            "(Kilian, 1998)."
        )
    what = "draw" if key == "asymptotic" or interval == "delta" else "replicate"
    out.append(
        f"Eigenvalues of each {what} were ordered by real part, then with the positive "
        f"imaginary part first; the class probabilities are the fractions of {what}s in "
        "each region of the trace–determinant plane, and P(stable) is the fraction with "
        "both eigenvalues in the left half-plane."
    )
    return out


def _a_label(label: str) -> str:
    if label == "non-isolated equilibria":
        return "a line of non-isolated equilibria"
    return ("an " if label[0] in "aeiou" else "a ") + label


def _were(n: int) -> str:
    return "was" if n == 1 else "were"


def methods_text(fit: Any) -> tuple[list[str], list[str]]:
    """The methods paragraph of a fit, in plain words, and its references.

    Parameters
    ----------
    fit : Fit

    Returns
    -------
    paragraphs : list of str
        Sentences grouped in paragraphs, ready to paste into a paper.
    references : list of str
        Full citations of the published methods named in the paragraphs.
    """
    rec = fit.recording
    refs: list[str] = []
    log = rec.log
    traj = f"{rec.n_trajectories} trajector{'y' if rec.n_trajectories == 1 else 'ies'}"
    first = (
        f"The dynamics of {rec.channels[0]} and {rec.channels[1]} near an equilibrium were "
        f"described by the linear model dx/dt = A (x − x*) and estimated from "
        f"{rec.n_samples} samples in {traj} with fitdyn {__version__}. "
    )
    if log.kept_rows == log.input_rows:
        cleaning = f"All {log.input_rows} input rows were used"
    else:
        cleaning = f"Of {log.input_rows} input rows, {log.kept_rows} were used"
    extra = []
    if log.merged_rows:
        extra.append(
            f"{log.merged_rows} {_were(log.merged_rows)} averaged into rows sharing their timestamp"
        )
    if log.dropped_rows:
        reasons = ", ".join(
            f"{n} {r}" for r, n in sorted(log.dropped().items(), key=lambda kv: str(kv[0]))
        )
        extra.append(f"{log.dropped_rows} {_were(log.dropped_rows)} dropped ({reasons})")
    cleaning += ("; " + "; ".join(extra)) if extra else ""
    cleaning += "."
    n_out = log.flagged().get("outlier", 0)
    if n_out:
        refs.append("hampel")
        what = "sample flagged as an outlier" if n_out == 1 else "samples flagged as outliers"
        cleaning += (
            f" {n_out} {what} by the Hampel identifier (Hampel, 1974) "
            f"{_were(n_out)} kept in the fit."
        )
    p1 = first + cleaning + " " + _estimator_sentence(fit, refs)
    refs.append("strogatz")
    p2 = (
        "The equilibrium was classified from the trace and determinant of A "
        f"(trace–determinant plane; Strogatz, 2015) as {_a_label(fit.label)} "
        f"({fit.stability}); boundary classes such as centers and stars were "
        f"assigned only within a relative tolerance of {fit.rtol:g}."
    )
    v = fit.verdict
    if v.assessed:
        level = f"{100 * float(v.confidence):.0f} %"
        if v.label != "undetermined":
            p2 += (
                f" At the {level} level the replicates support this class "
                f"(P = {fmt.prob(v.probabilities.get(v.label))})."
            )
        else:
            probable = [c for c in v.candidates if c in v.probabilities]
            p2 += (
                f" At the {level} level the data do not decide the class: it is "
                f"{join_labels(probable)} ("
                + " / ".join(f"P = {fmt.prob(v.probabilities[c])}" for c in probable)
                + ")"
                + (
                    "; a boundary class cannot be excluded (" + ", ".join(v.cannot_exclude) + ")"
                    if v.cannot_exclude
                    else ""
                )
                + "."
            )
    p3 = " ".join(_uncertainty_sentences(fit, refs))
    refs.append("ljungbox")
    p4 = (
        "Residual whiteness was checked with the autocorrelation function and the "
        "Ljung–Box test (Ljung & Box, 1978)."
    )
    seen: list[str] = []
    for r in refs:
        if r not in seen:
            seen.append(r)
    return [p1, p2, p3 + " " + p4], [_REFS[r] for r in seen]


# ----------------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------------
def _caption(fit: Any, kind: str) -> str:
    unc = fit.uncertainty
    conf = f"{100 * float(unc.confidence):.0f} %" if unc is not None else ""
    outliers = bool(np.any(fit.recording.outlier))
    if kind == "phase":
        text = "Points: cleaned samples, coloured by trajectory"
        if outliers:
            text += "; crosses: samples flagged as outliers (kept in the fit)"
        text += (
            ". Lines: fitted trajectories, each starting at an open circle. Grey: flow of the "
            "fitted matrix. Dotted lines: nullclines, where one channel does not change. "
            "The diamond is the equilibrium (filled when the verdict is asymptotically "
            "stable at the confidence level)."
        )
        if np.all(np.asarray(fit.eigenvalues).imag == 0):
            text += (
                " Solid and dashed straight lines: the slow and fast eigen directions "
                "through the equilibrium."
            )
        if unc is not None:
            text += f" Shaded ellipse: {conf} region of the equilibrium from the replicates."
        return text
    if kind == "series":
        return (
            "Top: each channel against time, with the fitted curve of each trajectory "
            "and the equilibrium level (dashed). Bottom: residuals, data minus fitted "
            "curve" + ("; crosses mark flagged outliers." if outliers else ".")
        )
    if kind == "eigen":
        if unc is None:
            return (
                "Point estimates of the eigenvalues; no uncertainty analysis was run. The "
                "imaginary axis is the stability boundary; the shaded half-plane is "
                "unstable."
            )
        return (
            f"Point estimates (plus signs) with the bootstrap replicates and their {conf} "
            "regions (ellipses for complex pairs, bars on the real axis for real "
            "eigenvalues). The imaginary axis is the stability boundary; the shaded "
            "half-plane is unstable."
        )
    if kind == "tracedet":
        text = (
            "Regions of the trace–determinant plane: saddles below the trace axis, nodes "
            "between the trace axis and the parabola τ² = 4Δ, spirals above it; the "
            "positive determinant axis holds the centers."
        )
        if unc is not None:
            text += (
                " Each region shows the fraction of bootstrap replicates that fall in "
                "it; the points are the replicates."
            )
        return text
    if kind == "residuals":
        return (
            "Autocorrelation of the estimator's residuals per channel, with the ±1.96/√n "
            "band of white noise and the Ljung–Box p-value. Bars far outside the band, "
            "or a small p-value, mean the residuals are not white: the linear model, the "
            "noise model or the sampling may not suit the data, and intervals may be "
            "too narrow."
        )
    return ""


def _render_figure(
    fit: Any, kind: str, formats: tuple[str, ...], dpi: int, folder: Path
) -> dict[str, Any]:
    import matplotlib.pyplot as plt

    from fitdyn import plots

    out = plots.plot(fit, kind)
    fig = out if hasattr(out, "savefig") else out.figure
    try:
        with __import__("matplotlib").rc_context(plots.STYLE):
            buf = io.BytesIO()
            fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
            png = buf.getvalue()
            files = []
            for fmt in formats:
                name = f"figure-{kind}.{fmt}"
                if fmt == "png":
                    data = png
                else:
                    b = io.BytesIO()
                    meta = {"Date": None} if fmt == "svg" else {"CreationDate": None}
                    fig.savefig(b, format=fmt, metadata=meta)
                    data = b.getvalue()
                write_bytes(folder / name, data)
                files.append(name)
        w, h = fig.get_size_inches() * dpi
    finally:
        plt.close(fig)
    return {
        "kind": kind,
        "title": _TITLES.get(kind, kind),
        "caption": _caption(fit, kind),
        "src": "data:image/png;base64," + base64.b64encode(png).decode("ascii"),
        "files": files,
        # shown at 100 px per inch of figure: sharp on high-density screens too
        "width": int(round(w * 100 / dpi)),
        "height": int(round(h * 100 / dpi)),
    }


# ----------------------------------------------------------------------------------
# the page
# ----------------------------------------------------------------------------------
def _environment():
    import jinja2

    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(_TEMPLATES)),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_html(fit: Any, figures: list[dict[str, Any]], files: list[tuple[str, str]]) -> str:
    """The report page as a string.

    Parameters
    ----------
    fit : Fit
    figures : list of dict
        Rendered figures (``kind``, ``title``, ``caption``, ``src`` data URI,
        ``files``, ``width``, ``height``).
    files : list of (name, description)
        The files of the folder, for the footer.

    Returns
    -------
    str
        HTML; every string from the data is escaped by the template engine.
    """
    rec = fit.recording
    methods, references = methods_text(fit)
    ivs_note = ""
    if fit.uncertainty is not None:
        ivs_note = (
            f"Bracketed ranges are {100 * float(fit.uncertainty.confidence):.0f} % "
            "intervals from the uncertainty analysis."
        )
    warnings = list(fit.warnings)
    unreliable, checks = _diagnostics_context(fit)
    verdict = _verdict(fit)  # neutral cards when a check failed (Verdict.tone)
    css = (_TEMPLATES / "report.css").read_text(encoding="utf-8")
    from markupsafe import Markup

    context = {
        "version": __version__,
        "source": str(rec.source) if rec.source else "in-memory data",
        "channels_text": ", ".join(
            _unit(c, u) for c, u in zip(rec.channels, rec.units, strict=True)
        ),
        "method": fit.method,
        "written": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "css": Markup(css),  # our own style sheet, not user data
        "verdict": verdict,
        "unreliable": unreliable,
        "checks": checks,
        "warnings": warnings,
        "matrix": _matrix(fit),
        "summary_rows": _summary_rows(fit),
        "interval_note": ivs_note,
        "estimator_notes": list(fit.estimate.notes)
        + list(getattr(fit.uncertainty, "notes", ()) or ()),
        "summary_text": fit.summary(),
        "figures": figures,
        "data_rows": _data_rows(fit),
        "cleaning_rows": _cleaning_rows(fit),
        "cleaning_notes": list(rec.log.notes),
        "balanced": rec.log.balanced(),
        "methods": methods,
        "references": references,
        "cautions": list(CAUTIONS),
        "files": files,
    }
    return _environment().get_template("report.html.j2").render(**context)


#: The file in every report folder listing what fitdyn wrote there (name, size, SHA-256).
MANIFEST = "fitdyn-manifest.json"


def _digest(path: Path) -> str:
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _write_manifest(folder: Path) -> None:
    import json

    from fitdyn import __version__

    files = {
        p.name: {"bytes": p.stat().st_size, "sha256": _digest(p)}
        for p in sorted(folder.iterdir())
        if p.is_file() and p.name != MANIFEST
    }
    text = json.dumps({"written_by": f"fitdyn {__version__}", "files": files}, indent=2)
    write_text(folder / MANIFEST, text + "\n")


def _check_replaceable(folder: Path) -> None:
    """Refuse to replace a folder unless it is empty or fitdyn wrote all of it.

    Replacing swaps the whole folder, so it happens only when the folder's manifest
    (:data:`MANIFEST`, written by fitdyn) lists every entry in it with the size and
    SHA-256 it had when written: a data folder given by mistake, a file added to an
    old report or a page edited by hand are never lost.
    """
    import json

    from fitdyn.safety import check_report_folder

    check_report_folder(folder)
    if not folder.is_dir():
        return
    entries = sorted(p.name for p in folder.iterdir())
    if not entries:
        return

    def refuse(why: str) -> None:
        raise ReportError(
            f"{folder}: will not replace this folder because {why}; give a new or empty "
            "folder, or move those files away"
        )

    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
        listed = manifest["files"]
        if not (isinstance(listed, dict) and str(manifest["written_by"]).startswith("fitdyn")):
            raise ValueError
    except FileNotFoundError:
        shown = ", ".join(entries[:5]) + (" ..." if len(entries) > 5 else "")
        refuse(f"it holds files fitdyn did not list as its own ({shown}; no {MANIFEST})")
    except (OSError, ValueError, KeyError, TypeError):
        refuse(f"its {MANIFEST} cannot be read")
    foreign = [e for e in entries if e != MANIFEST and e not in listed]
    if foreign:
        shown = ", ".join(foreign[:5]) + (" ..." if len(foreign) > 5 else "")
        refuse(f"it holds files fitdyn did not write ({shown})")
    for name in entries:
        if name == MANIFEST:
            continue
        p = folder / name
        info = listed[name]
        try:
            same = (
                p.is_file()
                and not p.is_symlink()
                and p.stat().st_size == info["bytes"]
                and _digest(p) == info["sha256"]
            )
        except (OSError, KeyError, TypeError):
            same = False
        if not same:
            refuse(f"{name} was changed since fitdyn wrote it")


def write_report(
    fit: Any,
    folder: str | os.PathLike,
    formats: tuple[str, ...] | list[str] = ("png", "svg"),
    *,
    dpi: int = 150,
    kinds: tuple[str, ...] | list[str] | None = None,
) -> Path:
    """Write the self-contained report folder of a fit, atomically.

    Parameters
    ----------
    fit : Fit
        The result of :func:`fitdyn.fit`.
    folder : path-like
        The report folder.  An existing folder is replaced, but only once the new
        one has been written completely (on any failure it is left as it was), and
        only when it is empty or an earlier fitdyn report holding nothing else:
        another folder given by mistake is never replaced.
    formats : sequence of str
        Files written for each figure, from :data:`FORMATS` (the page itself always
        embeds PNG).
    dpi : int
        Resolution of the PNG figures.
    kinds : sequence of str, optional
        Figures to include (default: all of :data:`fitdyn.plots.KINDS`).

    Returns
    -------
    Path
        The path of ``index.html``.

    Raises
    ------
    ReportError
        For an unknown format or figure kind, a folder that is not a report, or
        when the folder cannot be written.
    """
    from fitdyn import plots

    formats = tuple(str(f).lower().lstrip(".") for f in formats)
    bad = [f for f in formats if f not in FORMATS]
    if bad:
        raise ReportError(
            f"unknown figure format(s) {', '.join(bad)}; choose from {', '.join(FORMATS)}"
        )
    kinds = tuple(plots.KINDS if kinds is None else kinds)
    bad = [k for k in kinds if k not in plots.KINDS]
    if bad:
        raise ReportError(
            f"unknown figure kind(s) {', '.join(bad)}; choose from {', '.join(plots.KINDS)}"
        )
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise ReportError(f"{folder} exists and is not a folder; choose another report folder")
    source = getattr(fit.recording, "source", None)
    if isinstance(source, str) and os.path.isfile(source):
        from fitdyn.safety import check_outputs

        check_outputs([("report folder", folder)], [source], folders=("report folder",))
    _check_replaceable(folder)

    def build(tmp: Path) -> None:
        figures = [_render_figure(fit, kind, formats, dpi, tmp) for kind in kinds]
        fit.to_json(tmp / "result.json")
        write_csv_frame(tmp / "cleaned.csv", fit.recording.to_frame())
        files = [
            ("index.html", "this page"),
            ("result.json", "all numbers, schema fitdyn/1"),
            ("cleaned.csv", "the cleaned samples"),
            (MANIFEST, "what fitdyn wrote here, with sizes and SHA-256"),
        ]
        for f in figures:
            files.extend((name, f["title"].lower()) for name in f["files"])
        write_text(tmp / "index.html", render_html(fit, figures, files))
        _write_manifest(tmp)

    try:
        replace_dir(folder, build)
    except OSError as exc:
        raise ReportError(
            f"cannot write the report folder {folder}: {exc.strerror or exc}; "
            "check the path and its permissions"
        ) from exc
    return folder / "index.html"
