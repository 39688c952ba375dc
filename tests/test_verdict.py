"""Tests of the three-way verdict (fitdyn.verdict) and how every output shows it."""

from __future__ import annotations

import dataclasses
import json
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

import fitdyn
from fitdyn import report
from fitdyn.verdict import Verdict, a_label, join_labels, verdict_of


def _unc(probs, p_stable, consistent=(), confidence=0.95, p_stable_upper=None, **kw):
    """A stand-in for fitdyn.bootstrap.Uncertainty with exactly these numbers."""
    return SimpleNamespace(
        confidence=confidence,
        class_probabilities=dict(probs),
        p_stable=p_stable,
        p_stable_upper=p_stable if p_stable_upper is None else p_stable_upper,
        consistent_with=list(consistent),
        failure_label=kw.pop("failure_label", "failed fit"),
        replicates=kw.pop("replicates", 1000),
        **kw,
    )


def _stand_in(unc, label="stable spiral", stability="asymptotically stable", diagnostics=()):
    return SimpleNamespace(
        label=label, stability=stability, uncertainty=unc, diagnostics=diagnostics
    )


# ----------------------------------------------------------------------------------
# the rules, on exact numbers
# ----------------------------------------------------------------------------------
def test_even_odds_near_a_center_are_undetermined():
    unc = _unc({"stable spiral": 0.5, "unstable spiral": 0.5}, 0.5, consistent=["center"])
    v = verdict_of(_stand_in(unc))
    assert v.stability == "undetermined" and v.label == "undetermined"
    assert v.candidates == ("stable spiral", "unstable spiral", "center")
    assert v.headline() == (
        "undetermined: stable or unstable spiral (P 0.50 / 0.50); cannot exclude a center"
    )
    assert v.tone == "neutral"
    d = v.to_dict()
    assert d["stability"] == "undetermined" and d["label"] == "undetermined"
    assert d["candidates"] == ["stable spiral", "unstable spiral", "center"]
    assert d["confidence"] == 0.95


def test_decided_when_the_probability_reaches_the_level():
    unc = _unc({"stable spiral": 0.97, "stable node": 0.03}, 0.995)
    v = verdict_of(_stand_in(unc))
    assert v.label == "stable spiral" and v.stability == "stable"
    # candidates: every class with P >= 1 - 0.95
    assert v.candidates == ("stable spiral",)
    assert v.headline().startswith("stable spiral (P 0.97), asymptotically stable")
    assert v.tone == "stable"
    # the same numbers at 99 %: not decided
    v99 = verdict_of(_stand_in(_unc({"stable spiral": 0.97, "stable node": 0.03}, 0.995,
                                    confidence=0.99)))  # fmt: skip
    assert v99.label == "undetermined" and v99.stability == "stable"
    assert v99.candidates == ("stable spiral", "stable node")
    assert "stable spiral or stable node (P 0.97 / 0.03)" in v99.headline()


def test_unstable_and_failed_replicates_count_against_both_verdicts():
    unc = _unc({"saddle": 0.97, "failed fit": 0.03}, 0.0, p_stable_upper=0.03)
    v = verdict_of(_stand_in(unc, "saddle", "unstable"))
    assert v.stability == "unstable" and v.p_unstable == pytest.approx(0.97)
    assert v.tone == "unstable"
    # 93 % stable, 5 % failed: stable only if the failures were all stable -> undetermined
    unc = _unc({"stable node": 0.93, "failed fit": 0.05, "saddle": 0.02}, 0.93,
               p_stable_upper=0.98)  # fmt: skip
    v = verdict_of(_stand_in(unc, "stable node"))
    assert v.stability == "undetermined" and v.label == "undetermined"
    assert "failed" not in v.candidates
    assert "5 % of the replicates failed" in v.headline()


def test_without_uncertainty_there_is_no_confidence():
    v = verdict_of(_stand_in(None, "unstable node", "unstable"))
    assert v.confidence is None and v.candidates == () and not v.assessed
    assert v.label == "unstable node" and v.stability == "not assessed"
    assert v.point_stability == "unstable"
    assert "the point estimate is unstable" in v.stability_text()
    assert "not assessed" in v.headline() and "point estimate" in v.headline()
    assert v.to_dict()["confidence"] is None and v.to_dict()["candidates"] == []
    assert v.tone == "neutral"


def test_failed_adequacy_checks_make_it_not_reliable():
    unc = _unc({"stable spiral": 1.0}, 1.0)
    check = SimpleNamespace(
        name="residual whiteness", statistic=80.0, threshold=20.0, verdict="fail",
        advice="the linear model leaves structure; try another method",
    )  # fmt: skip
    ok = SimpleNamespace(name="record length", statistic=9, threshold=3, verdict="pass",
                         advice="")  # fmt: skip
    v = verdict_of(_stand_in(unc, diagnostics=(ok, check)))
    assert v.headline() == (
        "not reliable: residual whiteness failed. The fit alone reads: stable spiral (P 1.00)"
    )
    assert v.to_dict()["not_reliable"] == ["residual whiteness"]
    assert v.tone == "neutral"
    # warnings alone do not
    warn = SimpleNamespace(**{**vars(check), "verdict": "warn"})
    assert verdict_of(_stand_in(unc, diagnostics=(ok, warn))).headline().startswith("stable spiral")


def test_label_words():
    assert join_labels(["stable spiral", "unstable spiral"]) == "stable or unstable spiral"
    assert join_labels(["stable node", "stable spiral"]) == "stable node or stable spiral"
    assert join_labels(["saddle", "stable node", "unstable node"]) == (
        "saddle, stable node or unstable node"
    )
    assert a_label("unstable star") == "an unstable star" and a_label("center") == "a center"
    assert a_label("non-isolated equilibria") == "non-isolated equilibria"


# ----------------------------------------------------------------------------------
# a real spiral near a center, simulated with a general ODE solver
# ----------------------------------------------------------------------------------
def _near_center_frame(seed=4):
    # a center x' = -y, y' = x (trace 0, det 1; common practice, no source), solved by
    # scipy's solve_ivp and observed with 5 % sensor noise: the data cannot tell a
    # slowly growing from a slowly decaying spiral
    A = np.array([[0.0, -1.0], [1.0, 0.0]])
    t = np.linspace(0, 30, 301)
    sol = solve_ivp(lambda _t, x: A @ x, (0, 30), [2.0, 0.0], t_eval=t, rtol=1e-10, atol=1e-12)
    X = sol.y.T + 0.05 * np.random.default_rng(seed).standard_normal((t.size, 2))
    return pd.DataFrame({"t": t, "p [bar]": X[:, 0], "q [bar]": X[:, 1]})


@pytest.fixture(scope="module")
def near_center():
    return fitdyn.fit(
        _near_center_frame(), method="integral", bootstrap=500, seed=1, quiet=True, time_unit="s"
    )


def test_spiral_near_a_center_reads_undetermined_everywhere(near_center, tmp_path):
    res = near_center
    p = res.uncertainty.p_stable
    assert 0.3 < p < 0.7  # about even odds
    v = res.verdict
    assert v.stability == "undetermined" and v.label == "undetermined"
    assert {"stable spiral", "unstable spiral", "center"} <= set(v.candidates)
    # the text says so, with the probabilities of both spirals
    text = res.summary()
    first = " ".join(text.split("\nStability")[0].split("\n\n", 1)[1].split())
    assert first.startswith("Verdict undetermined: stable or unstable spiral (P ")
    assert first.endswith("cannot exclude a center")
    assert "Stability        undetermined (P(stable) " in text
    assert "asymptotically stable" not in text.split("Point estimate")[0]
    # JSON
    d = json.loads(res.to_json())
    assert d["verdict"]["stability"] == "undetermined"
    assert d["verdict"]["label"] == "undetermined"
    assert d["verdict"]["confidence"] == 0.95
    assert "center" in d["verdict"]["candidates"]
    # the report card is neutral, not a bold coloured verdict
    cells = report._verdict(res)
    assert cells[0]["value"] == "undetermined" and cells[0]["tone"] == "neutral"
    assert cells[1]["value"] == "undetermined" and cells[1]["tone"] == "neutral"
    page = report.render_html(res, [], [])
    assert 'class="cell neutral"' in page and 'class="cell stable"' not in page
    # the notebook view too
    view = res._repr_html_()
    assert "undetermined: stable or unstable spiral" in view and "neutral" in view
    assert "font-weight:normal" in view
    assert "1/s" in view and view.count(" bar") >= 2  # units of A, lambda and x*
    assert "∞ (unbounded" in view
    # and the methods paragraph does not claim a class
    paras, _ = report.methods_text(res)
    assert "the data do not decide the class" in paras[1]


def test_time_constant_is_unbounded_when_the_real_part_may_be_zero(near_center):
    res = near_center
    lo, hi = res.uncertainty.intervals["eigenvalue_real"][0]
    assert lo < 0 < hi
    assert np.isfinite(res.time_constants[0])  # the point value is a (large) number ...
    text = res.summary()
    line = next(ln for ln in text.splitlines() if ln.strip().startswith("time constant"))
    assert "∞ (unbounded: at least" in line  # ... but it is shown as unbounded
    assert f"{res.time_constants[0]:.4g}" not in line
    # units: 1/s for the eigenvalues and A, channel units for x*
    assert "Eigenvalues  (1/s, 95 % intervals)" in text
    assert "System matrix A  (1/s;" in text
    eq = next(ln for ln in text.splitlines() if ln.startswith("Equilibrium x*"))
    assert eq.count("bar") == 2
    rows = {r["name"]: r["value"] for r in report._summary_rows(res)}
    assert rows["Time constant 1/|Re λ|"].startswith("∞")


def test_a_clear_case_is_decided_and_coloured():
    # a well-damped spiral, x' = A x solved by solve_ivp, 1 % sensor noise
    A = np.array([[-0.5, -2.0], [2.0, -0.5]])
    t = np.linspace(0, 10, 201)
    sol = solve_ivp(lambda _t, x: A @ x, (0, 10), [1.0, 0.0], t_eval=t, rtol=1e-10, atol=1e-12)
    X = sol.y.T + 0.01 * np.random.default_rng(0).standard_normal((t.size, 2))
    res = fitdyn.fit((t, X), method="integral", bootstrap=500, seed=2, quiet=True)
    v = res.verdict
    assert v.label == "stable spiral" and v.stability == "stable"
    assert res.summary().splitlines()[2].startswith("Verdict          stable spiral (P ")
    assert report._verdict(res)[0]["tone"] == "stable"
    # a finite time constant, with its interval, rounded to it
    lo, hi = res.uncertainty.intervals["time_constants"][0]
    line = next(ln for ln in res.summary().splitlines() if "time constant" in ln)
    assert "∞" not in line and "[" in line
    # the truth, 1/0.5 = 2 (common practice, no source), lies in the interval
    assert lo < 2.0 < hi


def test_fit_level_verdict_uses_failed_diagnostics():
    rec = fitdyn.simulate([[-1.0, 0.3], [0.2, -0.4]], [0, 0], [2.0, 1.0],
                          np.linspace(0, 10, 201), seed=0)  # fmt: skip
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    from fitdyn.diagnostics import Diagnostic

    failed = Diagnostic("stationarity", 5.0, 1.0, "fail", "split the record")
    res = dataclasses.replace(res, diagnostics=(failed,))
    assert res.verdict.not_reliable == (("stationarity", "split the record"),)
    assert "Verdict          not reliable: stationarity failed. The fit alone reads:" in (
        res.summary()
    )
    assert report._verdict(res)[0]["value"] == "not reliable"
    assert res.to_dict()["verdict"]["not_reliable"] == ["stationarity"]


def test_verdict_is_a_frozen_record():
    v = Verdict(stability="stable", label="stable node", candidates=("stable node",),
                confidence=0.9, p_stable=0.95, p_unstable=0.05,
                probabilities={"stable node": 0.93})  # fmt: skip
    with pytest.raises(dataclasses.FrozenInstanceError):
        v.label = "saddle"  # type: ignore[misc]
    assert str(v) == v.headline()


def test_without_uncertainty_the_headline_still_says_what_it_cannot_exclude():
    # the identifiability check's statement (det A within its uncertainty of zero) is a
    # verdict candidate: without intervals the headline says it beside the point label
    from fitdyn.diagnostics import NON_ISOLATED, Diagnostic

    ident = Diagnostic("identifiability", 0.8, 1.96, "pass", f"det near 0: {NON_ISOLATED}")
    v = verdict_of(_stand_in(None, "stable node", "asymptotically stable", (ident,)))
    assert v.cannot_exclude == ("non-isolated equilibria",)
    assert v.headline() == (
        "stable node by the point estimate alone; cannot exclude non-isolated equilibria; "
        "stability not assessed (no uncertainty analysis: bootstrap 0)"
    )
    # with intervals the class line lists it among the candidates
    unc = _unc({"stable node": 1.0}, 1.0)
    w = verdict_of(_stand_in(unc, "stable node", "asymptotically stable", (ident,)))
    assert w.candidates == ("stable node", "non-isolated equilibria")
    assert "cannot exclude non-isolated equilibria" in w.headline()
    # a pass without the statement adds nothing
    clean = Diagnostic("identifiability", 9.0, 1.96, "pass", "the determinant is away from zero")
    assert verdict_of(
        _stand_in(unc, "stable node", "asymptotically stable", (clean,))
    ).candidates == ("stable node",)
