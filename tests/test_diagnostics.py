"""Tests of the adequacy checks (fitdyn.diagnostics) on constructed good and bad data.

The data are simulated with scipy's general ODE solver (scipy.integrate.solve_ivp),
not with fitdyn's own simulator, and sampled with seeded Gaussian sensor noise.
"""

from __future__ import annotations

import functools
import re
from dataclasses import FrozenInstanceError, replace

import numpy as np
import pytest
from scipy.integrate import solve_ivp

import fitdyn
from fitdyn import diagnostics as dg
from fitdyn.errors import EstimationError, FitdynError

G_OVER_L = 9.81  # pendulum g / L (1 m arm)


_fit = functools.partial(fitdyn.fit, bootstrap=0)  # intervals only where a test asks


def _ivp(f, y0, t):
    sol = solve_ivp(f, (t[0], t[-1]), y0, t_eval=t, rtol=1e-10, atol=1e-12, method="DOP853")
    assert sol.success
    return sol.y.T


def _noisy(X, pct, seed):
    rng = np.random.default_rng(seed)
    return X + rng.normal(0.0, 1.0, X.shape) * (pct / 100.0) * X.std(axis=0)


def _linear(A, x0, t, pct=1.0, seed=0):
    A = np.asarray(A, dtype=float)
    return (t, _noisy(_ivp(lambda _t, y: A @ y, x0, t), pct, seed))


def _pendulum(theta0, t, c=0.3, pct=1.0, seed=0):
    X = _ivp(lambda _t, y: [y[1], -G_OVER_L * np.sin(y[0]) - c * y[1]], [theta0, 0.0], t)
    return (t, _noisy(X, pct, seed))


def _by_name(fit):
    return {d.name: d for d in fit.diagnostics}


# a lightly damped spiral: the series RLC natural response with alpha = R / (2 L) = 0.25,
# omega0 = 1 / sqrt(L C) = 2 (any circuits text, e.g. Nilsson & Riedel, from memory)
SPIRAL = [[0.0, 1.0], [-4.0, -0.5]]


@pytest.fixture(scope="module")
def good_fit():
    t = np.linspace(0.0, 20.0, 200)
    return _fit(_linear(SPIRAL, [2.0, 0.0], t, pct=2.0, seed=1), quiet=True)


@pytest.fixture(scope="module")
def pendulum_fit():
    t = np.linspace(0.0, 10.0, 200)
    return _fit(_pendulum(2.5, t, seed=2), quiet=True)


# -- the result type -----------------------------------------------------------------
def test_diagnostic_is_frozen_and_serialises():
    d = dg.Diagnostic("sampling", 0.2, np.pi / 2, "pass", "fine")
    assert d.to_dict() == {
        "name": "sampling",
        "statistic": 0.2,
        "threshold": np.pi / 2,
        "verdict": "pass",
        "advice": "fine",
    }
    with pytest.raises(FrozenInstanceError):
        d.verdict = "fail"  # type: ignore[misc]
    with pytest.raises(ValueError, match="verdict"):
        dg.Diagnostic("sampling", 0.2, 1.0, "maybe", "x")
    assert dg.Diagnostic("x", float("inf"), None, "fail", "y").to_dict()["statistic"] is None


def test_every_fit_carries_all_checks_in_order(good_fit):
    assert tuple(d.name for d in good_fit.diagnostics) == dg.NAMES
    out = good_fit.to_dict()
    assert [d["name"] for d in out["diagnostics"]] == list(dg.NAMES)
    assert set(out["diagnostics"][0]) == {"name", "statistic", "threshold", "verdict", "advice"}
    for d in good_fit.diagnostics:
        if d.verdict != "pass":
            assert d.message in good_fit.warnings


def test_good_linear_data_pass_every_check(good_fit):
    verdicts = {d.name: d.verdict for d in good_fit.diagnostics}
    assert verdicts == dict.fromkeys(dg.NAMES, "pass")
    assert dg.unreliable_reason(good_fit.diagnostics) is None
    text = good_fit.summary()
    assert "\nChecks\n" in text
    assert "not reliable" not in text


# -- nonlinearity ----------------------------------------------------------------------
def test_large_pendulum_swing_fails_nonlinearity_and_the_headline_says_so(pendulum_fit):
    d = _by_name(pendulum_fit)["nonlinearity"]
    assert d.verdict == "fail"
    assert d.statistic < dg.THRESHOLDS["nonlinearity"][1]
    assert "window" in d.advice
    reason = dg.unreliable_reason(pendulum_fit.diagnostics)
    assert reason is not None and "nonlinearity" in reason
    text = pendulum_fit.summary()
    head = text.index("Verdict          not reliable")
    assert head < text.index("Eigenvalues")
    assert d.message in pendulum_fit.warnings
    assert "check: nonlinearity" in pendulum_fit._repr_html_()


def test_small_pendulum_swing_passes_nonlinearity():
    # at 0.05 rad, sin(theta) = theta to 4e-4 relative: a linear system for the data
    t = np.linspace(0.0, 10.0, 200)
    f = _fit(_pendulum(0.05, t, seed=3), quiet=True)
    assert _by_name(f)["nonlinearity"].verdict == "pass"


@pytest.mark.parametrize("seed", [0, 1])
def test_predator_prey_at_twenty_percent_fails_nonlinearity(seed):
    # Lotka-Volterra x' = a x - b x y, y' = -c y + d x y: equilibrium (c/d, a/b),
    # linearised eigenvalues +- i sqrt(a c) (Murray, Mathematical Biology I, from memory)
    a, b, c, d = 1.0, 1.0, 1.0, 1.0
    t = np.linspace(0.0, 3 * 2 * np.pi, 200)
    X = _ivp(lambda _t, y: [a * y[0] - b * y[0] * y[1], -c * y[1] + d * y[0] * y[1]],
             [1.2, 1.0], t)  # fmt: skip
    f = _fit((t, _noisy(X, 1.0, seed)), quiet=True)
    assert _by_name(f)["nonlinearity"].verdict == "fail"


def test_van_der_pol_limit_cycle_fails_nonlinearity():
    mu = 1.0
    t = np.linspace(0.0, 30.0, 200)
    X = _ivp(lambda _t, y: [y[1], mu * (1 - y[0] ** 2) * y[1] - y[0]], [2.0, 0.0], t)
    f = _fit((t, _noisy(X, 2.0, 4)), quiet=True)
    assert _by_name(f)["nonlinearity"].verdict == "fail"


def test_nonlinearity_test_finds_a_pure_quadratic_term_in_noise_free_steps():
    # x' = -x + 0.3 y^2, y' = -2 y: only a quadratic term is missing from the linear model
    t = np.linspace(0.0, 6.0, 150)
    X = _ivp(lambda _t, y: [-y[0] + 0.3 * y[1] ** 2, -2.0 * y[1]], [1.0, 2.0], t)
    rec = fitdyn.read((t, _noisy(X, 0.5, 5)))
    est = _fit(rec, quiet=True).estimate
    p, form, _ = dg.nonlinearity_test(rec, est.matrix, est.offset)
    assert form in ("one-step", "curve")
    assert p < 1e-6


# -- the fitting window ------------------------------------------------------------------
def test_amplitude_window_recovers_the_small_signal_eigenvalues():
    # small-signal pendulum: lambda = -c/2 +- i sqrt(g/L - c^2/4) (damped oscillator,
    # common practice, no source)
    c = 0.3
    t = np.linspace(0.0, 30.0, 600)
    data = _pendulum(2.5, t, c=c, seed=6)
    full = _fit(data, quiet=True)
    win = _fit(data, window="amplitude:0.1", quiet=True)
    lam = complex(-c / 2, np.sqrt(G_OVER_L - c * c / 4))
    assert abs(full.eigenvalues[0] - lam) > 0.3
    assert abs(win.eigenvalues[0] - lam) < 0.05
    assert _by_name(win)["nonlinearity"].verdict == "pass"
    log = win.recording.log
    assert log.balanced()
    assert log.dropped()["outside the fitting window"] == 600 - win.recording.n_samples
    assert any("fitting window" in n for n in log.notes)


def test_time_window_keeps_the_interval():
    t = np.linspace(0.0, 30.0, 301)
    f = _fit(_pendulum(2.5, t, seed=7), window="time:20:", quiet=True)
    assert f.recording.times.min() >= 20.0
    assert f.recording.n_samples == 101
    f2 = _fit(_pendulum(2.5, t, seed=7), window=("time", 5.0, 10.0), quiet=True)
    assert f2.recording.times.min() >= 5.0 and f2.recording.times.max() <= 10.0


@pytest.mark.parametrize(
    "bad", ["amplitude:0", "amplitude:1.5", "time:5:1", "width:3", "amplitude", "time:a:b"]
)
def test_bad_window_is_one_clear_error(bad):
    with pytest.raises(FitdynError, match="window must be"):
        dg.parse_window(bad)


def test_window_that_leaves_too_little_is_refused():
    t = np.linspace(0.0, 30.0, 301)
    with pytest.raises(EstimationError, match="fitting window"):
        _fit(_pendulum(2.5, t, seed=8), window="time:29.5:40", quiet=True)


# -- whiteness: one function for the check and the figure ---------------------------------
def test_ljung_box_statistic_matches_the_formula():
    # Q = n (n + 2) sum_k r_k^2 / (n - k) (Ljung & Box, Biometrika 1978)
    rng = np.random.default_rng(9)
    x = rng.normal(size=(120, 2))
    w = dg.whiteness_test(x)
    assert w.lags == 10 and w.dof == 10 and not w.filtered
    for j in range(2):
        d = x[:, j] - x[:, j].mean()
        r = np.array([d[:-k] @ d[k:] for k in range(1, 11)]) / (d @ d)
        n = d.size
        q = n * (n + 2) * np.sum(r**2 / (n - np.arange(1, 11)))
        assert w.statistic[j] == pytest.approx(q, rel=1e-10)
        # chi-square upper tail with 10 degrees of freedom (scipy.stats.chi2)
        from scipy.stats import chi2

        assert w.p_value[j] == pytest.approx(chi2.sf(q, 10), rel=1e-10)
    # and the same numbers as statsmodels' acorr_ljungbox (a reference library), also
    # with degrees of freedom taken off for a fitted model
    from statsmodels.stats.diagnostic import acorr_ljungbox

    for j in range(2):
        ref = acorr_ljungbox(x[:, j], lags=[10], return_df=True)
        assert w.statistic[j] == pytest.approx(float(ref["lb_stat"].iloc[0]), rel=1e-10)
        assert w.p_value[j] == pytest.approx(float(ref["lb_pvalue"].iloc[0]), rel=1e-9)
    y = np.cumsum(rng.normal(size=120)) * 0.05 + rng.normal(size=120)
    wi = dg.whiteness_test(np.column_stack([y, y[::-1]]), method="instrumental")
    assert wi.filtered and wi.dof == 9
    xi = dg._ma1_innovations(y)
    ref = acorr_ljungbox(xi, lags=[10], model_df=1, return_df=True)
    assert wi.statistic[0] == pytest.approx(float(ref["lb_stat"].iloc[0]), rel=1e-10)
    assert wi.p_value[0] == pytest.approx(float(ref["lb_pvalue"].iloc[0]), rel=1e-9)


def test_f_test_matches_statsmodels_nested_ols():
    # The nested F test of the nonlinearity check against statsmodels' OLS
    # compare_f_test (a reference library) on random regressors.
    import statsmodels.api as sm

    rng = np.random.default_rng(4)
    Zr = np.column_stack([np.ones(80), rng.normal(size=(80, 2))])
    Zx = rng.normal(size=(80, 3))
    y = Zr @ [0.5, 1.0, -2.0] + 0.3 * Zx[:, 0] + rng.normal(size=80)
    F, p, _ = dg._f_test(y[:, None], Zr, Zx)
    full = sm.OLS(y, np.column_stack([Zr, Zx])).fit()
    small = sm.OLS(y, Zr).fit()
    F_ref, p_ref, _ = full.compare_f_test(small)
    assert F[0] == pytest.approx(F_ref, rel=1e-9)
    assert p[0] == pytest.approx(p_ref, rel=1e-9)


def test_moving_average_is_removed_for_the_instrumental_fits():
    rng = np.random.default_rng(10)
    e = rng.normal(size=(401, 2))
    x = e[1:] - 0.6 * e[:-1]  # MA(1), lag-1 autocorrelation -0.44
    assert dg.whiteness_test(x, "discrete").p_min < 1e-6
    w = dg.whiteness_test(x, "instrumental")
    assert w.filtered and w.dof == w.lags - 1
    assert w.p_min > 1e-3


def _autocorrelated(fit, seed=11):
    rng = np.random.default_rng(seed)
    m = fit.estimate.residuals.shape[0]
    r = np.zeros((m, 2))
    e = rng.normal(size=(m, 2))
    for k in range(1, m):
        r[k] = 0.9 * r[k - 1] + e[k]
    return r


def test_figure_and_check_print_the_same_ljung_box_numbers(good_fit):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    est = replace(good_fit.estimate, residuals=_autocorrelated(good_fit))
    bad = replace(good_fit, estimate=est)
    checks = dg.check(bad.recording, est, None, bad.label)
    white = {d.name: d for d in checks}["whiteness"]
    assert white.verdict == "fail"  # p ~ 1e-100 must never pass silently
    fig = bad.plot("residuals")
    titles = [a.get_title("left") for a in fig.axes if "Ljung-Box" in a.get_title("left")]
    ps = [float(re.search(r"p = ([0-9.eE+-]+)", s).group(1)) for s in titles]
    wt = dg.whiteness_test(est.residuals, est.method)
    assert ps == pytest.approx([float(f"{p:.3g}") for p in wt.p_value], rel=1e-12)
    assert white.statistic == pytest.approx(min(wt.p_value), rel=1e-12)
    plt.close(fig)


# -- sampling, record length, excitation -------------------------------------------------
def test_coarse_sampling_of_a_fast_spiral_fails():
    # |Im lambda| h = 2.6 of pi: under 2.5 samples per period
    w = 1.0
    A = [[-0.05, w], [-w, -0.05]]
    t = np.arange(200) * 2.6
    f = _fit(_linear(A, [3.0, 0.0], t, pct=2.0, seed=12), quiet=True)
    d = _by_name(f)["sampling"]
    assert d.verdict == "fail"
    assert "aliasing" in d.advice


def test_short_record_of_a_slow_node_warns():
    # eigenvalues -0.1 and -2 recorded for 3 time units: 0.3 slow time constants
    A = [[-0.1, 0.0], [0.0, -2.0]]
    t = np.linspace(0.0, 3.0, 200)
    f = _fit(_linear(A, [2.0, 2.0], t, pct=1.0, seed=13), quiet=True)
    d = _by_name(f)["record_length"]
    assert d.verdict in ("warn", "fail")
    assert d.statistic < 1.0


def test_trajectory_started_on_an_eigenvector_fails_excitation():
    # A = P diag(-0.3, -1.2) P^-1 started on the slow eigenvector: a straight line
    P = np.array([[1.0, 1.0], [0.5, -1.0]])
    A = P @ np.diag([-0.3, -1.2]) @ np.linalg.inv(P)
    t = np.linspace(0.0, 10.0, 200)
    f = _fit(_linear(A, 3.0 * P[:, 0], t, pct=1.0, seed=14), quiet=True)
    d = _by_name(f)["excitation"]
    assert d.verdict == "fail"
    assert "eigen direction" in d.advice
    assert "Verdict          not reliable" in f.summary()


# -- identifiability ------------------------------------------------------------------------
def test_constant_channel_is_refused_with_its_name():
    t = np.linspace(0.0, 20.0, 200)
    x1 = 2.0 * np.exp(-0.3 * t) * np.cos(t)
    with pytest.raises(EstimationError, match="column 'x2' is constant"):
        _fit((t, np.column_stack([x1, np.full(200, 3.0)])), quiet=True)


def test_all_zero_data_are_refused():
    t = np.linspace(0.0, 20.0, 200)
    with pytest.raises(EstimationError, match="is constant"):
        _fit((t, np.zeros((200, 2))), quiet=True)


def test_constant_channel_fails_identifiability_when_checked_directly(good_fit):
    rec = good_fit.recording.with_values(
        np.column_stack([good_fit.recording.values[:, 0], np.ones(good_fit.recording.n_samples)])
    )
    d = {x.name: x for x in dg.check(rec, good_fit.estimate)}
    assert d["identifiability"].verdict == "fail"
    assert d["excitation"].verdict == "fail"


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_exactly_singular_system_is_never_a_confident_generic_class(seed):
    # A = [[-1, 0], [0, 0]]: a line of equilibria; three trajectories, sensor noise
    A = np.array([[-1.0, 0.0], [0.0, 0.0]])
    t = np.linspace(0.0, 20.0, 200)
    rng = np.random.default_rng(seed)
    runs = []
    for k in range(3):
        X = _ivp(lambda _t, y: A @ y, rng.normal(0.0, 2.0, 2), t)
        runs.append(_noisy(X, 2.0, 100 * seed + k))
    import pandas as pd

    frame = pd.concat(
        [pd.DataFrame({"t": t, "a": X[:, 0], "b": X[:, 1], "run": k}) for k, X in enumerate(runs)]
    )
    f = _fit(frame, time="t", channels=["a", "b"], trajectory="run", quiet=True)
    # the verdict names the class or lists it among the classes it cannot exclude
    assert f.label == "non-isolated equilibria" or (
        "non-isolated equilibria" in f.verdict.cannot_exclude
    )
    assert "non-isolated" in f.summary().split("Eigenvalues")[0]
    d = _by_name(f)["identifiability"]
    assert dg.non_isolated_flag(f.diagnostics)
    # a determinant within its uncertainty of zero is a candidate (the check passes and
    # says so); a singular point estimate warns
    assert dg.NON_ISOLATED in d.advice or d.verdict == "warn"


def _singular_frame(seed):
    A = np.array([[-1.0, 0.0], [0.0, 0.0]])
    t = np.linspace(0.0, 20.0, 200)
    rng = np.random.default_rng(seed)
    import pandas as pd

    parts = []
    for k in range(3):
        X = _noisy(_ivp(lambda _t, y: A @ y, rng.normal(0.0, 2.0, 2), t), 2.0, 100 * seed + k)
        parts.append(pd.DataFrame({"t": t, "a": X[:, 0], "b": X[:, 1], "run": k}))
    return pd.concat(parts)


def test_exactly_singular_system_with_bootstrap_keeps_the_class_open():
    # with intervals, the verdict is at its confidence level: it may name a generic
    # class only beside "cannot exclude non-isolated equilibria"
    f = fitdyn.fit(
        _singular_frame(0), time="t", channels=["a", "b"], trajectory="run",
        bootstrap=200, seed=3, quiet=True,
    )  # fmt: skip
    v = f.verdict
    assert v.assessed
    assert v.label == "non-isolated equilibria" or "non-isolated equilibria" in v.candidates
    assert f.label == "non-isolated equilibria" or "non-isolated equilibria" in v.cannot_exclude
    assert "non-isolated equilibria" in v.headline()


def test_determinant_within_its_uncertainty_of_zero_is_a_candidate_not_an_alarm():
    # a slow node (eigenvalues -1 and -0.012) over a record a fraction of its slow time
    # constant: det A cannot be told from 0, which the verdict lists, but the data are
    # not defective, so the check passes and nothing is added to the warnings
    t = np.linspace(0.0, 10.0, 100)
    f = _fit(_linear([[-1.0, 0.0], [0.3, -0.012]], [2.0, 1.0], t, pct=3.0, seed=2), quiet=True)
    d = _by_name(f)["identifiability"]
    assert d.verdict == "pass"
    assert d.statistic < dg.THRESHOLDS["identifiability"][0]
    assert dg.NON_ISOLATED in d.advice
    assert dg.non_isolated_flag(f.diagnostics)
    assert f.verdict.cannot_exclude == ("non-isolated equilibria",)
    assert "cannot exclude non-isolated equilibria" in f.summary()
    assert not any(w.startswith("identifiability") for w in f.warnings)


def test_a_bootstrap_interval_containing_zero_is_a_candidate(good_fit):
    from types import SimpleNamespace

    unc = SimpleNamespace(intervals={"determinant": (-0.5, 8.0)})
    d = {x.name: x for x in dg.check(good_fit.recording, good_fit.estimate, unc, good_fit.label)}
    ident = d["identifiability"]
    assert ident.verdict == "pass"
    assert "bootstrap interval" in ident.advice and dg.NON_ISOLATED in ident.advice
    assert dg.non_isolated_flag(tuple(d.values()))


def test_singular_point_estimate_warns(good_fit):
    checks = dg.check(good_fit.recording, good_fit.estimate, None, "non-isolated equilibria")
    d = {x.name: x for x in checks}
    ident = d["identifiability"]
    assert ident.verdict == "warn" and "A is singular" in ident.advice
    assert dg.non_isolated_flag(tuple(d.values()))


def test_unidentified_parameters_warn(good_fit):
    est = replace(good_fit.estimate, warnings=("parameter(s) unidentified: a12",))
    ident = {x.name: x for x in dg.check(good_fit.recording, est)}["identifiability"]
    assert ident.verdict == "warn"
    assert "not determined" in ident.advice and dg.NON_ISOLATED in ident.advice


def test_exactly_collinear_channels_fail_identifiability(good_fit):
    x = good_fit.recording.values[:, 0]
    rec = good_fit.recording.with_values(np.column_stack([x, 3.0 * x + 1.0]))
    ident = {d.name: d for d in dg.check(rec, good_fit.estimate)}["identifiability"]
    assert ident.verdict == "fail" and "collinear" in ident.advice
    assert not dg.non_isolated_flag((ident,))


def test_non_isolated_flag_keys_on_the_statement_not_the_verdict():
    D = dg.Diagnostic
    said = f"the determinant 0.001 is within its uncertainty of zero: {dg.NON_ISOLATED}"
    assert dg.non_isolated_flag([D("identifiability", 0.5, 1.96, "pass", said)])
    assert dg.non_isolated_flag([D("identifiability", 0.5, 1.96, "pass", said).to_dict()])
    assert not dg.non_isolated_flag([D("identifiability", 9.0, 1.96, "pass", "away from 0")])
    assert dg.non_isolated_flag([D("identifiability", 0.0, 1.96, "warn", "A is singular: ...")])
    # the statement counts only from the identifiability check
    assert not dg.non_isolated_flag([D("agreement", 0.5, 4.0, "pass", said)])
    assert not dg.non_isolated_flag([])


def test_determinant_far_from_zero_passes_identifiability(good_fit):
    d = _by_name(good_fit)["identifiability"]
    assert d.verdict == "pass"
    assert d.statistic > dg.THRESHOLDS["identifiability"][0]
    assert dg.NON_ISOLATED not in d.advice
    assert not dg.non_isolated_flag(good_fit.diagnostics)


# -- agreement -----------------------------------------------------------------------------
def test_agreement_fails_when_the_chosen_estimate_is_off(good_fit):
    est = good_fit.estimate
    d = {x.name: x for x in dg.check(good_fit.recording, est)}["agreement"]
    assert d.verdict == "pass"
    off = replace(est, matrix=est.matrix * 1.5)
    d = {x.name: x for x in dg.check(good_fit.recording, off)}["agreement"]
    assert d.verdict == "fail"
    assert "disagree" in d.advice


def test_agreement_compares_the_nonlinear_instrumental_fit_with_itself_thinned():
    # Irregular steps with process and sensor noise, simulated here by Euler-Maruyama
    # at a fine step (0.01; common practice, no source), not by the package's own
    # simulator, then sampled at 300 random times: the nonlinear instrumental fit's
    # agreement check compares it with its own fit on
    # every second sample; a matrix three times too fast does not pass it (its
    # intervals are wide under this much noise: 1.5 times is 3 standard errors).
    from fitdyn.estimators import get_estimator

    A = np.array([[-0.3, 1.0], [-1.0, -0.3]])
    rng = np.random.default_rng(17)
    fine = np.arange(0.0, 60.0, 0.01)
    x = np.empty((fine.size, 2))
    x[0] = [3.0, 0.0]
    for k in range(fine.size - 1):
        x[k + 1] = x[k] + 0.01 * (A @ x[k]) + np.sqrt(0.01 * 0.3) * rng.standard_normal(2)
    pick = np.sort(rng.choice(fine.size, 300, replace=False))
    y = x[pick] + 0.3 * rng.standard_normal((300, 2))
    rec = fitdyn.read((fine[pick], y))
    est = get_estimator("nonlinear-iv", noise="moments").fit(rec)
    d = {x.name: x for x in dg.check(rec, est)}["agreement"]
    assert d.statistic is not None and d.verdict == "pass", d.advice
    assert "nonlinear-iv on every second sample" in d.advice
    off = replace(est, matrix=est.matrix * 3.0)
    assert {x.name: x for x in dg.check(rec, off)}["agreement"].verdict != "pass"


# -- outputs --------------------------------------------------------------------------------
def test_unreliable_reason_reads_dicts_and_objects():
    ok = dg.Diagnostic("sampling", 0.1, 1.0, "pass", "")
    bad = dg.Diagnostic("record_length", 0.01, 0.1, "fail", "")
    assert dg.unreliable_reason([ok]) is None
    assert dg.unreliable_reason([]) is None
    r = dg.unreliable_reason([ok, bad])
    assert r == "the record is too short for the slowest mode (record_length)"
    assert dg.unreliable_reason([ok.to_dict(), bad.to_dict()]) == r


def test_report_has_a_checks_table_and_no_confident_card(pendulum_fit):
    from fitdyn.report import render_html

    page = render_html(pendulum_fit, [], [])
    assert 'id="checks"' in page
    assert 'id="unreliable"' in page
    assert page.count("<tr class=") >= len(dg.NAMES)
    assert 'class="cell stable"' not in page and 'class="cell unstable"' not in page


def test_cli_window_option(tmp_path, capsys):
    from fitdyn.cli import main

    t = np.linspace(0.0, 30.0, 301)
    _, X = _pendulum(2.5, t, seed=15)
    path = tmp_path / "swing.csv"
    rows = ["time,angle,rate"] + [f"{a},{b},{c}" for a, (b, c) in zip(t, X, strict=True)]
    path.write_text("\n".join(rows) + "\n")
    assert main(["fit", str(path), "--window", "time:20:"]) == 0
    out = capsys.readouterr().out
    assert "101 samples" in out
    assert main(["fit", str(path), "--window", "sideways"]) == 2
    err = capsys.readouterr().err
    assert "window must be" in err and len(err.strip().splitlines()) == 1


def test_a_flagged_outlier_is_not_read_as_curvature():
    # a linear node (solve_ivp) with one 5 K spike, which the importer flags and keeps
    A = [[-0.35, 0.30], [0.15, -0.20]]
    t = np.linspace(0.0, 60.0, 240)
    data_t, X = _linear(A, [8.0, 3.0], t, pct=1.0, seed=16)
    X = X.copy()
    X[120, 0] += 5.0
    f = _fit((data_t, X), quiet=True)
    assert f.recording.outlier.sum() >= 1
    assert _by_name(f)["nonlinearity"].verdict == "pass"


def test_demo_recordings_of_linear_systems_pass_nonlinearity():
    # the demo files are simulated from linear models (data_demo/README.md)
    from pathlib import Path

    demo = Path(__file__).resolve().parent.parent / "data_demo"
    for name in ("chamber_cooling.csv", "torsion_rig.csv", "reactor_runaway.csv"):
        f = _fit(demo / name, quiet=True)
        assert _by_name(f)["nonlinearity"].verdict == "pass", name


def test_notebook_view_says_not_reliable_first(pendulum_fit, good_fit):
    page = pendulum_fit._repr_html_()
    assert page.index("not reliable") < page.index("matrix A")
    assert "not reliable" not in good_fit._repr_html_()
