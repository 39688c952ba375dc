"""Tests of the figures: each kind renders (Agg) and draws what it promises."""

from __future__ import annotations

import dataclasses
import types
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402
import scipy.stats  # noqa: E402
from matplotlib.collections import PathCollection  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

import fitdyn  # noqa: E402
from fitdyn import classify, linalg2, plots  # noqa: E402

DEMO = Path(__file__).resolve().parent.parent / "data_demo"

A_SPIRAL = np.array([[-0.2, -1.0], [1.0, -0.2]])
A_NODE = np.array([[-1.0, 0.3], [0.2, -0.4]])
A_SADDLE = np.array([[1.0, 1.0], [4.0, -2.0]])  # Strogatz example 5.2.1 (from memory)


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def by_gid(container, gid):
    """Artists of an Axes (or Figure) with a given gid."""
    return [a for a in container.findobj() if a.get_gid() == gid]


def legend_texts(ax):
    leg = ax.get_legend()
    return [t.get_text() for t in leg.get_texts()] if leg is not None else []


def spiral_recording(trajectories=3, noise=0.03, seed=2):
    starts = [[3.0, 0.0], [0.0, -2.0], [-1.5, 1.0], [2.0, 2.0]][:trajectories]
    return fitdyn.simulate(
        A_SPIRAL,
        [1.0, 2.0],
        starts,
        np.linspace(0, 15, 121),
        measurement_noise=noise,
        seed=seed,
        channels=("prey", "predator"),
        units=("t/km2", "t/km2"),
        time_unit="yr",
    )


def fake_uncertainty(A, b, B=400, sd=0.03, seed=5, confidence=0.95):
    """An object with the attributes of fitdyn.bootstrap.Uncertainty, from a normal cloud."""
    rng = np.random.default_rng(seed)
    M = A + sd * rng.standard_normal((B, 2, 2))
    bb = b + sd * rng.standard_normal((B, 2))
    eq = linalg2.solve(M, -bb)
    lam = linalg2.eigvals(M)
    codes, stab = classify.classify_codes(M, 0.0)
    probs = {lab: float(np.mean(codes == i)) for i, lab in enumerate(classify.GENERIC)}
    tau, det, disc = linalg2.invariants(M)
    lo, hi = (1 - confidence) / 2, (1 + confidence) / 2

    def q(x):
        return np.quantile(x, [lo, hi], axis=0).T.tolist()

    return types.SimpleNamespace(
        replicates=B,
        scheme="blocks",
        method="percentile",
        confidence=confidence,
        seed=seed,
        matrices=M,
        offsets=bb,
        equilibria=eq,
        eigenvalues=lam,
        valid=np.ones(B, dtype=bool),
        intervals={
            "trace": q(tau),
            "determinant": q(det),
            "discriminant": q(disc),
            "max_real_part": q(lam.real.max(axis=1)),
            "eigenvalue_real": q(lam.real),
            "eigenvalue_imag": q(lam.imag),
            "equilibrium": q(eq),
        },
        class_probabilities=probs,
        p_stable=float(np.mean(stab == 0)),
        consistent_with=[],
        bias_corrected=False,
        warnings=(),
        notes=(),
        to_dict=lambda: {"replicates": B},
    )


@pytest.fixture(scope="module")
def spiral_fit():
    return fitdyn.fit(spiral_recording(), method="integral", bootstrap=0)


@pytest.fixture(scope="module")
def spiral_fit_unc(spiral_fit):
    unc = fake_uncertainty(spiral_fit.matrix, spiral_fit.offset)
    return dataclasses.replace(spiral_fit, uncertainty=unc)


@pytest.fixture(scope="module")
def chamber_fit():
    # demo file: one flagged outlier (and one repeated timestamp merged away)
    return fitdyn.fit(DEMO / "chamber_cooling.csv", method="integral", bootstrap=0)


@pytest.fixture(scope="module")
def boot_fit():
    return fitdyn.fit(spiral_recording(), method="integral", bootstrap=200, seed=1, quiet=True)


# ----------------------------------------------------------------------------------
def test_kinds_and_unknown_kind(spiral_fit):
    assert plots.KINDS == ("phase", "series", "eigen", "tracedet", "residuals")
    with pytest.raises(ValueError, match="unknown figure kind 'nope'"):
        plots.plot(spiral_fit, "nope")


def test_fit_plot_returns_a_figure_for_every_kind(spiral_fit):
    panels = {"phase": 1, "series": 4, "eigen": 1, "tracedet": 1, "residuals": 2}
    for kind in plots.KINDS:
        out = spiral_fit.plot(kind)
        assert type(out) is Figure, kind
        drawn = [a for a in out.axes if isinstance(a, matplotlib.axes.Axes)]
        assert len(drawn) >= panels[kind], kind


def test_phase_draws_every_trajectory_nullclines_and_labels(spiral_fit):
    ax = plots.plot(spiral_fit, "phase").axes[0]
    rec = spiral_fit.recording
    for k in range(rec.n_trajectories):
        (data,) = by_gid(ax, f"data-{k}")
        assert data.get_xydata().shape[0] == np.count_nonzero(rec.trajectory == k)
        (curve,) = by_gid(ax, f"fitted-{k}")
        # the fitted curve is fit.fitted on a fine grid
        t = rec.times[rec.trajectory == k]
        grid = np.linspace(t[0], t[-1], 400)
        np.testing.assert_allclose(curve.get_xydata(), spiral_fit.fitted(grid, trajectory=k))
    assert not by_gid(ax, f"fitted-{rec.n_trajectories}")
    assert by_gid(ax, "flow")
    # nullclines pass through the equilibrium with the slopes of A's rows
    xs = spiral_fit.equilibrium
    A = spiral_fit.matrix
    for i in range(2):
        (line,) = by_gid(ax, f"nullcline-{i}")
        p1, p2 = np.asarray(line._xy1), np.asarray(line._xy2)
        for p in (p1, p2):
            assert A[i] @ (p - xs) == pytest.approx(0.0, abs=1e-9 * (1 + np.abs(p).max()))
    # a spiral has no real eigen directions
    assert not by_gid(ax, "eigen-slow") and not by_gid(ax, "eigen-fast")
    assert ax.get_xlabel() == "prey [t/km2]" and ax.get_ylabel() == "predator [t/km2]"
    texts = legend_texts(ax)
    assert "trajectory 1" in texts and "prey nullcline" in texts
    assert "stable spiral" in ax.get_title("left")
    # no uncertainty: no region, and a note says so
    assert not by_gid(ax, "equilibrium-region")
    assert "no uncertainty analysis" in ax._fitdyn_note.get_text()


def test_phase_marks_outliers_and_draws_slow_and_fast_directions(chamber_fit):
    rec = chamber_fit.recording
    n_out = int(rec.outlier.sum())
    assert n_out >= 1
    ax = plots.plot(chamber_fit, "phase", field="arrows").axes[0]
    (marks,) = by_gid(ax, "outliers")
    np.testing.assert_allclose(marks.get_xydata(), rec.values[rec.outlier])
    (data,) = by_gid(ax, "data-0")
    # every kept sample is drawn exactly once (dropped/merged rows are not in the recording)
    assert data.get_xydata().shape[0] + n_out == rec.n_samples
    (slow,) = by_gid(ax, "eigen-slow")
    (fast,) = by_gid(ax, "eigen-fast")
    lam = chamber_fit.eigenvalues.real
    V = chamber_fit.eigenvectors.real
    k_slow = int(np.argmin(np.abs(lam)))
    # common practice, no source: the slow direction is the eigenvector of the smaller |lambda|
    d = np.asarray(slow._xy2) - np.asarray(slow._xy1)
    assert abs(d @ V[:, k_slow]) / np.linalg.norm(d) == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(slow._xy1, chamber_fit.equilibrium)
    texts = legend_texts(ax)
    assert any(t.startswith("slow direction") for t in texts)
    assert any(t.startswith("fast direction") for t in texts)
    assert any("flagged outlier" in t for t in texts)


def test_saddle_directions_say_growing_and_decaying():
    rec = fitdyn.simulate(A_SADDLE, [0.5, -0.5], [0.9, -0.2], np.linspace(0, 1.2, 61), seed=0)
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    assert res.label == "saddle"
    ax = plots.plot(res, "phase").axes[0]
    texts = legend_texts(ax)
    # Strogatz example 5.2.1 (from memory): eigenvalues 2 and -3
    assert any("growing" in t and "λ = 2" in t for t in texts)
    assert any("decaying" in t and "λ = -3" in t for t in texts)


def test_chi_square_radius_and_ellipse_coverage():
    # reference: scipy.stats.chi2 quantile with 2 degrees of freedom
    for c in (0.5, 0.9, 0.95, 0.99):
        assert plots._chi2_radius(c) ** 2 == pytest.approx(scipy.stats.chi2.ppf(c, 2))
    rng = np.random.default_rng(3)
    C = np.array([[2.0, 0.8], [0.8, 0.5]])
    pts = rng.multivariate_normal([1.0, -1.0], C, size=20000)
    ring = plots.confidence_ellipse(pts, 0.95)
    from matplotlib.path import Path as MplPath

    inside = MplPath(ring).contains_points(pts)
    assert inside.mean() == pytest.approx(0.95, abs=0.01)
    # a cloud on a line, or too few points, has no ellipse
    assert plots.confidence_ellipse(np.c_[np.arange(10.0), np.arange(10.0)], 0.95) is None
    assert plots.confidence_ellipse(pts[:2], 0.95) is None
    assert plots.confidence_ellipse(np.full((5, 2), np.nan), 0.95) is None


def test_phase_with_uncertainty_draws_equilibrium_region(spiral_fit_unc):
    unc = spiral_fit_unc.uncertainty
    ax = plots.plot(spiral_fit_unc, "phase").axes[0]
    (ring,) = by_gid(ax, "equilibrium-region")
    expected = plots.confidence_ellipse(unc.equilibria, 0.95)
    np.testing.assert_allclose(ring.get_xydata(), expected)
    assert any("95 % region of x*" in t for t in legend_texts(ax))


def test_series_has_curves_per_trajectory_and_residuals_beneath(spiral_fit):
    fig = plots.plot(spiral_fit, "series")
    axes = fig.axes
    assert len(axes) == 4
    R = spiral_fit.recording.n_trajectories
    top, bottom = axes[:2], axes[2:]
    resid = spiral_fit.residuals()
    for j, ax in enumerate(top):
        assert len([a for a in ax.lines if str(a.get_gid()).startswith("fitted-")]) == R
        assert ax.get_ylabel() == ("prey", "predator")[j] + " [t/km2]"
    for j, ax in enumerate(bottom):
        pts = np.concatenate([by_gid(ax, f"residual-{k}")[0].get_xydata() for k in range(R)])
        np.testing.assert_allclose(np.sort(pts[:, 1]), np.sort(resid[:, j]))
        assert ax.get_xlabel() == "time [yr]"
        # shared time axis with the panel above
        assert ax.get_shared_x_axes().joined(ax, top[j])


def test_eigen_without_uncertainty_draws_point_estimate_and_boundary(spiral_fit):
    ax = plots.plot(spiral_fit, "eigen").axes[0]
    for k in range(2):
        (pt,) = by_gid(ax, f"estimate-{k}")
        lam = spiral_fit.eigenvalues[k]
        np.testing.assert_allclose(pt.get_xydata()[0], [lam.real, lam.imag])
    (boundary,) = by_gid(ax, "stability-boundary")
    assert np.allclose(boundary.get_xdata(), 0.0)
    assert by_gid(ax, "unstable-half-plane")
    assert not by_gid(ax, "cloud-0")
    assert "point estimate only" in ax._fitdyn_note.get_text()
    x0, x1 = ax.get_xlim()
    assert x0 < 0 < x1


def test_eigen_with_cloud_draws_regions(spiral_fit_unc):
    unc = spiral_fit_unc.uncertainty
    ax = plots.plot(spiral_fit_unc, "eigen").axes[0]
    for k in range(2):
        (cloud,) = by_gid(ax, f"cloud-{k}")
        assert isinstance(cloud, PathCollection)
        assert cloud.get_offsets().shape[0] == unc.replicates
        (ring,) = by_gid(ax, f"region-{k}")
        z = unc.eigenvalues[:, k]
        expected = plots.confidence_ellipse(np.c_[z.real, z.imag], 0.95)
        np.testing.assert_allclose(ring.get_xydata(), expected)
    assert "400 bootstrap replicates" in ax.get_title("left")


def test_eigen_real_cloud_gets_intervals_on_the_real_axis(chamber_fit):
    unc = fake_uncertainty(chamber_fit.matrix, chamber_fit.offset, sd=0.002)
    assert np.all(unc.eigenvalues.imag == 0)
    res = dataclasses.replace(chamber_fit, uncertainty=unc)
    ax = plots.plot(res, "eigen").axes[0]
    for k in range(2):
        assert not by_gid(ax, f"region-{k}")
        (bar,) = by_gid(ax, f"interval-{k}")
        np.testing.assert_allclose(
            bar.get_xdata(), np.quantile(unc.eigenvalues[:, k].real, [0.025, 0.975])
        )


def test_tracedet_regions_parabola_and_probabilities(spiral_fit_unc):
    unc = spiral_fit_unc.uncertainty
    ax = plots.plot(spiral_fit_unc, "tracedet").axes[0]
    (par,) = by_gid(ax, "parabola")
    tau, det = par.get_xdata(), par.get_ydata()
    np.testing.assert_allclose(tau**2, 4 * det)
    for label in classify.GENERIC:
        (text,) = by_gid(ax, f"region-{label}")
        body = text.get_text()
        assert body.startswith(label)
        assert f"P = {unc.class_probabilities[label]:.2f}" in body or "P <" in body or "P >" in body
    assert (
        ax.region_texts["stable spiral"]
        .get_text()
        .endswith(f"{unc.class_probabilities['stable spiral']:.2f}")
    )
    (est,) = by_gid(ax, "estimate")
    np.testing.assert_allclose(
        est.get_xydata()[0], [spiral_fit_unc.trace, spiral_fit_unc.determinant]
    )
    (cloud,) = by_gid(ax, "cloud")
    M = unc.matrices
    np.testing.assert_allclose(cloud.get_offsets()[:, 0], M[:, 0, 0] + M[:, 1, 1])
    assert "P(stable)" in ax.get_title("left")


def test_tracedet_region_labels_follow_the_classification():
    # each region label must sit in the region whose class it names
    for A in (A_SPIRAL, A_NODE, A_SADDLE):
        rec = fitdyn.simulate(A, [0.0, 0.0], [1.0, 0.5], np.linspace(0, 1, 21), seed=0)
        res = fitdyn.fit(rec, method="integral", bootstrap=0)
        ax = plots.plot(res, "tracedet").axes[0]
        for label, text in ax.region_texts.items():
            t, d = text.get_position()
            # a matrix with this trace and determinant: companion form
            C = np.array([[0.0, 1.0], [-d, t]])
            assert classify.classify(C, rtol=0.0)[0] == label
            x0, x1 = ax.get_xlim()
            y0, y1 = ax.get_ylim()
            assert x0 < t < x1 and y0 < d < y1
        assert "no probabilities" in ax._fitdyn_note.get_text()
        assert "P =" not in ax.region_texts["saddle"].get_text()


def test_residual_autocorrelation_matches_statsmodels(spiral_fit):
    from statsmodels.stats.diagnostic import acorr_ljungbox
    from statsmodels.tsa.stattools import acf

    fig = plots.plot(spiral_fit, "residuals")
    resid = np.asarray(spiral_fit.estimate.residuals)
    n = resid.shape[0]
    for j, ax in enumerate(fig.axes[:2]):
        (bars,) = by_gid(ax, "acf")
        segs = bars.get_segments()
        heights = np.array([s[1][1] for s in segs])
        # reference: statsmodels' acf (the same biased estimator)
        ref = acf(resid[:, j], nlags=len(heights), fft=False)[1:]
        np.testing.assert_allclose(heights, ref, atol=1e-12)
        p = acorr_ljungbox(resid[:, j], lags=[10], return_df=True)["lb_pvalue"].iloc[0]
        assert f"Ljung-Box p = {p:.3g}" in ax.get_title("left")
    assert any(f"n = {n}" in t for t in legend_texts(fig.axes[1]))


def test_residual_band_is_1_96_over_root_n(spiral_fit):
    fig = plots.plot(spiral_fit, "residuals", source="curve")
    n = spiral_fit.recording.n_samples
    ax = fig.axes[0]
    (band,) = by_gid(ax, "band")
    # axhspan: a rectangle from -band to +band in data units on the y axis
    assert band.get_y() == pytest.approx(-1.96 / np.sqrt(n), rel=1e-12)
    assert band.get_y() + band.get_height() == pytest.approx(1.96 / np.sqrt(n), rel=1e-12)
    with pytest.raises(ValueError, match="source"):
        plots.plot(spiral_fit, "residuals", source="bogus")


def test_drawing_into_given_axes_and_figures(spiral_fit):
    fig, ax = plt.subplots()
    assert plots.plot(spiral_fit, "phase", ax=ax) is fig
    assert ax.lines  # drawn into the given Axes
    fig2 = plt.figure()
    assert plots.plot(spiral_fit, "series", ax=fig2) is fig2
    # a SubFigure: the top-level Figure comes back too
    fig4 = plt.figure()
    sub = fig4.subfigures(1, 2)[1]
    assert plots.plot(spiral_fit, "eigen", ax=sub.add_subplot()) is fig4
    assert len(fig2.axes) == 4
    fig3, axes = plt.subplots(1, 2)
    assert plots.plot(spiral_fit, "residuals", ax=axes) is fig3
    with pytest.raises(TypeError, match="2 panels"):
        plots.plot(spiral_fit, "residuals", ax=ax)


def test_real_bootstrap_figures(boot_fit):
    unc = boot_fit.uncertainty
    assert unc is not None and unc.replicates == 200
    ax = plots.plot(boot_fit, "tracedet").axes[0]
    for label in classify.GENERIC:
        p = unc.class_probabilities.get(label, 0.0)
        assert plots._fmt_p(p) in ax.region_texts[label].get_text()
    ax = plots.plot(boot_fit, "eigen").axes[0]
    n_valid = int(np.count_nonzero(unc.valid))
    assert by_gid(ax, "cloud-0")[0].get_offsets().shape[0] == n_valid
    ax = plots.plot(boot_fit, "phase").axes[0]
    assert by_gid(ax, "equilibrium-region")


def test_fmt_p_never_rounds_to_certainty():
    assert plots._fmt_p(0.0) == "0.00"
    assert plots._fmt_p(1.0) == "1.00"
    assert plots._fmt_p(0.001) == "< 0.01"
    assert plots._fmt_p(0.998) == "> 0.99"
    assert plots._fmt_p(0.5) == "0.50"


def test_dollar_signs_in_names_are_shown_literally():
    # "$...$" would start matplotlib's mathtext; an unbalanced "\frac" would not parse
    rec = spiral_recording(trajectories=1)
    rec = dataclasses.replace(rec, channels=(r"cost $\frac{$", "b"), units=("$", None))
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    for kind in plots.KINDS:
        out = plots.plot(res, kind)
        fig = out
        fig.canvas.draw()  # would raise on a mathtext parse error
    ax = plots.plot(res, "phase").axes[0]
    assert ax.get_xlabel() == r"cost \$\frac{\$ [\$]"


def test_singular_matrix_has_no_equilibrium_but_still_draws():
    # a line of equilibria: A = [[-1, 1], [1, -1]] has det 0 (common practice, no source)
    A = np.array([[-1.0, 1.0], [1.0, -1.0]])
    rec = fitdyn.simulate(A_NODE, [0.0, 0.0], [1.0, 0.5], np.linspace(0, 3, 16), seed=0)
    base = fitdyn.fit(rec, method="integral", bootstrap=0)
    est = dataclasses.replace(
        base.estimate, matrix=A, offset=np.array([0.5, -0.5]), equilibrium=None
    )
    lam, vec = linalg2.eigvecs(A[None])
    res = dataclasses.replace(
        base,
        estimate=est,
        eigenvalues=lam[0],
        eigenvectors=vec[0],
        label="non-isolated equilibria",
        stability="stable (not asymptotically)",
    )
    for kind in plots.KINDS:
        opts = {"points": 40} if kind in ("phase", "series") else {}
        out = plots.plot(res, kind, **opts)
        fig = out
        fig.canvas.draw()
    ax = plots.plot(res, "phase", points=40).axes[0]
    assert "no unique equilibrium" in ax._fitdyn_note.get_text()
    assert not by_gid(ax, "equilibrium")
    assert len(by_gid(ax, "start-0")) == 1


def test_phase_figure_never_reads_more_sure_than_the_verdict():
    # a center seen through noise: the verdict is undetermined, so the figure's title
    # must say so and the equilibrium marker must not be filled as "stable"
    from scipy.integrate import solve_ivp

    A = np.array([[0.0, 1.0], [-1.0, 0.0]])
    t = np.linspace(0.0, 20.0, 200)
    sol = solve_ivp(lambda _t, y: A @ y, (0.0, 20.0), [1.0, 0.0], t_eval=t, rtol=1e-10)
    X = sol.y.T + np.random.default_rng(1).normal(0.0, 0.05, (200, 2))
    res = fitdyn.fit((t, X), bootstrap=300, seed=1, quiet=True)
    assert res.verdict.stability == "undetermined"
    fig = res.plot("phase")
    ax = fig.axes[0]
    assert "undetermined" in ax.get_title(loc="left")
    eq = [ln for ln in ax.lines if ln.get_gid() == "equilibrium"][0]
    assert eq.get_markerfacecolor() == "white"
    plt.close(fig)
