"""The verdict of a fit at its confidence level: stable, unstable or undetermined.

A fit names a class and a stability only when the uncertainty analysis supports it
at the chosen confidence ``c``:

* stability is ``"stable"`` (asymptotically) when ``P(stable) >= c``, ``"unstable"``
  when ``P(unstable) >= c``, else ``"undetermined"``;
* the label is the class whose probability is at least ``c``, else
  ``"undetermined"``;
* the candidates are the classes whose probability is at least ``1 - c`` and the
  boundary classes (center, star, degenerate node, non-isolated equilibria) that the
  intervals cannot exclude.

``P(stable)`` counts failed replicates as not stable and ``P(unstable)`` counts them
as not unstable (``1 - p_stable_upper``), so a failed replicate never helps either
verdict.  Without an uncertainty analysis there is no confidence: the verdict carries
the point estimate's class with ``confidence`` None, no candidates and stability
``"not assessed"`` (the point estimate's own stability stays in ``point_stability``
and in the JSON ``classification``).

A fit whose adequacy checks failed (``fit.diagnostics`` entries with ``verdict ==
"fail"``) is headlined "not reliable" with the failed checks and their advice instead
of a class.

These are statements about a linearisation estimated from noisy data; decisions that
affect safety, health or compliance defer to local codes and licensed practice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from fitdyn import classify
from fitdyn.fmt import prob

__all__ = ["Verdict", "verdict_of", "join_labels", "a_label"]

#: Slack for comparing a probability with the confidence level (replicate fractions).
_EPS = 1e-9


def a_label(label: str) -> str:
    """The label with its article: ``a center``, ``an unstable node``."""
    if label == "non-isolated equilibria":
        return label
    return ("an " if label[0] in "aeiou" else "a ") + label


def join_labels(labels: list[str] | tuple[str, ...]) -> str:
    """``stable or unstable spiral``; ``stable node or stable spiral``; ``a, b or c``."""
    labels = list(labels)
    if not labels:
        return ""
    if len(labels) == 2:
        heads = [lab.split(" ", 1) for lab in labels]
        if (
            all(len(h) == 2 for h in heads)
            and heads[0][1] == heads[1][1]
            and {heads[0][0], heads[1][0]} == {"stable", "unstable"}
        ):
            return f"{heads[0][0]} or {heads[1][0]} {heads[0][1]}"
    if len(labels) == 1:
        return labels[0]
    return ", ".join(labels[:-1]) + " or " + labels[-1]


@dataclass(frozen=True)
class Verdict:
    """What the data decide about the equilibrium, at the fit's confidence.

    Attributes
    ----------
    stability : str
        ``"stable"``, ``"unstable"`` or ``"undetermined"``; ``"not assessed"``
        without an uncertainty analysis (the point estimate's stability is then in
        ``point_stability``).
    label : str
        A class of :data:`fitdyn.classify.LABELS` or ``"undetermined"``.
    candidates : tuple of str
        Classes of probability at least ``1 - confidence``, most probable first,
        then the boundary classes the intervals cannot exclude; empty without an
        uncertainty analysis.
    confidence : float or None
        The level; None without an uncertainty analysis.
    p_stable, p_unstable : float or None
        The probabilities the stability verdict rests on.
    probabilities : dict
        Probability of each candidate that has one (boundary classes have none).
    cannot_exclude : tuple of str
        The boundary classes among the candidates.
    point_label, point_stability : str
        Class and stability of the point estimate.
    failed_fraction : float
        Fraction of replicates that gave no system (see the warnings).
    failure_label : str
        What those replicates are called.
    not_reliable : tuple of (name, advice)
        Failed adequacy checks; when any, the headline says "not reliable".
    """

    stability: str
    label: str
    candidates: tuple[str, ...]
    confidence: float | None
    p_stable: float | None = None
    p_unstable: float | None = None
    probabilities: dict[str, float] = field(default_factory=dict)
    cannot_exclude: tuple[str, ...] = ()
    point_label: str = ""
    point_stability: str = ""
    failed_fraction: float = 0.0
    failure_label: str = "failed fit"
    not_reliable: tuple[tuple[str, str], ...] = ()

    @property
    def assessed(self) -> bool:
        """Whether an uncertainty analysis stands behind the verdict."""
        return self.confidence is not None

    @property
    def determined(self) -> bool:
        """Whether both the label and the stability were decided at the level."""
        return self.assessed and self.label != "undetermined" and self.stability != "undetermined"

    @property
    def tone(self) -> str:
        """``"stable"``, ``"unstable"`` or ``"neutral"`` (undetermined, unassessed or
        not reliable): the colour of the report's card."""
        if self.not_reliable or not self.assessed or self.stability == "undetermined":
            return "neutral"
        return self.stability

    # -- text ------------------------------------------------------------------------
    def _level(self) -> str:
        return f"{100 * float(self.confidence):.0f} %" if self.assessed else ""

    def stability_text(self) -> str:
        """E.g. ``asymptotically stable (P(stable) 1.00)``; ``undetermined (P(stable)
        0.50, P(unstable) 0.50)``; ``not assessed ...`` without intervals."""
        if not self.assessed:
            return (
                f"not assessed (no uncertainty analysis; the point estimate is "
                f"{self.point_stability})"
            )
        if self.stability == "stable":
            return f"asymptotically stable (P(stable) {prob(self.p_stable)})"
        if self.stability == "unstable":
            return f"unstable (P(unstable) {prob(self.p_unstable)})"
        return (
            f"undetermined (P(stable) {prob(self.p_stable)}, P(unstable) {prob(self.p_unstable)})"
        )

    def class_text(self) -> str:
        """E.g. ``stable spiral (P 0.99)`` or ``undetermined: stable or unstable
        spiral (P 0.50 / 0.50); cannot exclude a center``."""
        if not self.assessed:
            text = f"{self.point_label} (point estimate; no uncertainty analysis)"
            if self.cannot_exclude:
                text += "; cannot exclude " + join_labels([a_label(c) for c in self.cannot_exclude])
            return text
        probable = [c for c in self.candidates if c in self.probabilities]
        if self.label != "undetermined":
            text = f"{self.label} (P {prob(self.probabilities.get(self.label))})"
        elif probable:
            ps = " / ".join(prob(self.probabilities[c]) for c in probable)
            text = f"undetermined: {join_labels(probable)} (P {ps})"
        else:
            text = "undetermined"
        if self.cannot_exclude:
            text += "; cannot exclude " + join_labels([a_label(c) for c in self.cannot_exclude])
        if self.failed_fraction > 0 and (
            self.label == "undetermined" or self.failed_fraction >= 1 - float(self.confidence)
        ):
            text += (
                f"; {100 * self.failed_fraction:.0f} % of the replicates failed "
                f"({self.failure_label})"
            )
        return text

    def headline(self) -> str:
        """The one-line answer that opens the summary, the report and the notebook view."""
        if self.not_reliable:
            from fitdyn.diagnostics import FAILURE_REASONS

            # short reasons only: the checks' advice is in the warnings and the checks
            parts = []
            for name, _advice in self.not_reliable:
                reason = FAILURE_REASONS.get(name)
                parts.append(f"{reason} ({name} failed)" if reason else f"{name} failed")
            return (
                "not reliable: " + "; ".join(parts) + f". The fit alone reads: {self.class_text()}"
            )
        if not self.assessed:
            # the boundary classes the adequacy checks cannot exclude (the determinant
            # within its delta-method uncertainty of zero) are said here too
            cannot = (
                "; cannot exclude " + join_labels([a_label(c) for c in self.cannot_exclude])
                if self.cannot_exclude
                else ""
            )
            return (
                f"{self.point_label} by the point estimate alone{cannot}; stability not "
                "assessed (no uncertainty analysis: bootstrap 0)"
            )
        cls = self.class_text()
        if self.label != "undetermined":
            return f"{cls}, {self.stability_text()} at the {self._level()} level"
        if self.stability != "undetermined":
            return f"{cls}; {self.stability_text()} at the {self._level()} level"
        return cls

    def __str__(self) -> str:
        return self.headline()

    def to_dict(self) -> dict[str, Any]:
        """The ``"verdict"`` block of the JSON result.

        Layout::

            {"stability": "stable" | "unstable" | "undetermined" | "not assessed",
             "label": <class> | "undetermined",
             "candidates": [label, ...], "confidence": c or null,
             "basis": "uncertainty analysis" | "point estimate",
             "p_stable": p or null, "p_unstable": p or null,
             "cannot_exclude": [label, ...], "not_reliable": [check name, ...],
             "headline": str}
        """
        return {
            "stability": self.stability,
            "label": self.label,
            "candidates": list(self.candidates),
            "confidence": None if self.confidence is None else float(self.confidence),
            "basis": "uncertainty analysis" if self.assessed else "point estimate",
            "p_stable": None if self.p_stable is None else float(self.p_stable),
            "p_unstable": None if self.p_unstable is None else float(self.p_unstable),
            "cannot_exclude": list(self.cannot_exclude),
            "not_reliable": [name for name, _ in self.not_reliable],
            "headline": self.headline(),
        }


def _failed_checks(fit: Any) -> tuple[tuple[str, str], ...]:
    out = []
    for d in getattr(fit, "diagnostics", ()) or ():
        if getattr(d, "verdict", None) == "fail":
            out.append((str(getattr(d, "name", "check")), str(getattr(d, "advice", "") or "")))
    return tuple(out)


def _flagged_non_isolated(fit: Any) -> tuple[str, ...]:
    """``("non-isolated equilibria",)`` when the identifiability check cannot exclude
    them and the point label is not already that class."""
    from fitdyn.diagnostics import non_isolated_flag

    if fit.label != "non-isolated equilibria" and non_isolated_flag(
        getattr(fit, "diagnostics", ()) or ()
    ):
        return ("non-isolated equilibria",)
    return ()


def verdict_of(fit: Any) -> Verdict:
    """The :class:`Verdict` of a fit (``fit.verdict`` calls this).

    Parameters
    ----------
    fit : Fit
        Needs ``label``, ``stability``, ``uncertainty`` (or None) and, when present,
        ``diagnostics``.
    """
    failed = _failed_checks(fit)
    unc = getattr(fit, "uncertainty", None)
    if unc is None:
        return Verdict(
            stability="not assessed",
            label=fit.label,
            candidates=(),
            confidence=None,
            cannot_exclude=_flagged_non_isolated(fit),
            point_label=fit.label,
            point_stability=fit.stability,
            not_reliable=failed,
        )
    c = float(unc.confidence)
    p_st = float(unc.p_stable)
    upper = float(getattr(unc, "p_stable_upper", float("nan")))
    p_un = 1.0 - (upper if math.isfinite(upper) else p_st)
    if p_st >= c - _EPS:
        stability = "stable"
    elif p_un >= c - _EPS:
        stability = "unstable"
    else:
        stability = "undetermined"
    probs = {k: float(v) for k, v in dict(unc.class_probabilities).items()}
    classes = {k: v for k, v in probs.items() if k in classify.LABELS}
    best = max(classes, key=classes.get) if classes else None
    label = best if best is not None and classes[best] >= c - _EPS else "undetermined"
    ranked = [
        k
        for k, v in sorted(classes.items(), key=lambda kv: (-kv[1], classify.LABELS.index(kv[0])))
        if v > 0 and v >= 1 - c - _EPS
    ]
    cannot = tuple(k for k in getattr(unc, "consistent_with", ()) or () if k not in ranked)
    cannot += tuple(k for k in _flagged_non_isolated(fit) if k not in cannot + tuple(ranked))
    failure_label = str(getattr(unc, "failure_label", "failed fit"))
    failed_fraction = float(probs.get(failure_label, 0.0)) if failure_label not in classes else 0.0
    return Verdict(
        stability=stability,
        label=label,
        candidates=tuple(ranked) + cannot,
        confidence=c,
        p_stable=p_st,
        p_unstable=p_un,
        probabilities={k: classes[k] for k in ranked},
        cannot_exclude=cannot,
        point_label=fit.label,
        point_stability=fit.stability,
        failed_fraction=failed_fraction,
        failure_label=failure_label,
        not_reliable=failed,
    )
