"""Figures of a fit: what was fitted and how sure it is.

One entry point, :func:`plot`, draws one of the :data:`KINDS`:

``"phase"``
    Phase plane: the cleaned samples of each trajectory (flagged outliers marked),
    the fitted trajectories through them, the flow of the fitted matrix, the
    nullclines, the equilibrium with its confidence region and, for real
    eigenvalues, the slow and fast eigen directions (one panel).
``"series"``
    Each channel against time with the fitted curve of every trajectory, and the
    residuals (data minus fitted curve) beneath on the same time axis (four
    panels).
``"eigen"``
    Eigenvalue plane: the point estimates, the bootstrap cloud and its confidence
    regions; the imaginary axis is the stability boundary and the unstable half-plane
    is shaded (one panel).
``"tracedet"``
    Trace-determinant plane: the class regions bounded by the axes and the parabola
    ``trace^2 = 4 det``, the estimate and the bootstrap cloud, every region labelled
    with its class and (with uncertainty) its probability (one panel).
``"residuals"``
    Autocorrelation of the estimator's residuals per channel with the
    ``+-1.96 / sqrt(n)`` band and the Ljung-Box p-value (Ljung & Box, Biometrika
    1978) from :func:`fitdyn.diagnostics.whiteness_test`, the function the
    ``whiteness`` check uses, so the figure and the check print the same numbers
    (two panels).

Every kind returns the same type: the matplotlib :class:`~matplotlib.figure.Figure`
it drew on (the top-level Figure, also when an Axes or a SubFigure was passed);
its panels are ``fig.axes``.

The kinds that need the uncertainty analysis (``"eigen"``, ``"tracedet"``, the
equilibrium region of ``"phase"``) draw the point estimate only, with a note, when
the fit has none.

The look (palette, type sizes, line weights) is fitdyn's own and lives in
:data:`PALETTE` and :data:`STYLE`; every figure is drawn inside
``matplotlib.rc_context(STYLE)``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib import patheffects as _patheffects

from fitdyn import classify

__all__ = ["KINDS", "PALETTE", "STYLE", "plot", "confidence_ellipse"]

#: The figure kinds :func:`plot` draws.
KINDS: tuple[str, ...] = ("phase", "series", "eigen", "tracedet", "residuals")

#: Colours, by role.  Muted earth and slate tones, chosen for fitdyn.
PALETTE: dict[str, Any] = {
    "ink": "#26303b",
    "muted": "#6d7682",
    "grid": "#e6e3dd",
    "paper": "#fdfcfa",
    "flow": "#c3c8cf",
    "fit": "#26303b",
    "equilibrium": "#9c2f2f",
    "region": "#9c2f2f",
    "slow": "#1e6a63",
    "fast": "#c47c1a",
    "nullcline": ("#5a4e8c", "#8a5a3c"),
    "outlier": "#d1495b",
    "cloud": "#5c7899",
    "estimate": "#9c2f2f",
    "unstable": "#f6e7df",
    "stable": "#e7f0ea",
    "saddle": "#eeecf3",
    "band": "#e9e4da",
    "bars": "#3f6e8c",
    "trajectories": (
        "#3f6e8c",  # slate blue
        "#b8652e",  # rust
        "#5d8a4f",  # moss
        "#8a4f7d",  # mulberry
        "#b3943a",  # mustard
        "#4a8a8c",  # sea green
        "#7a6a58",  # umber
        "#a34848",  # brick
    ),
}

#: matplotlib rc settings of every fitdyn figure (bundled DejaVu fonts only).
STYLE: dict[str, Any] = {
    "figure.facecolor": PALETTE["paper"],
    "axes.facecolor": "white",
    "savefig.facecolor": PALETTE["paper"],
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 8.0,
    "axes.labelsize": 9.5,
    "axes.labelcolor": PALETTE["ink"],
    "axes.edgecolor": PALETTE["muted"],
    "axes.linewidth": 0.8,
    "axes.grid": True,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "grid.color": PALETTE["grid"],
    "grid.linewidth": 0.6,
    "grid.linestyle": "-",
    "xtick.color": PALETTE["muted"],
    "ytick.color": PALETTE["muted"],
    "xtick.labelcolor": PALETTE["ink"],
    "ytick.labelcolor": PALETTE["ink"],
    "xtick.labelsize": 8.5,
    "ytick.labelsize": 8.5,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "legend.fontsize": 8.0,
    "legend.frameon": True,
    "legend.framealpha": 0.92,
    "legend.edgecolor": PALETTE["grid"],
    "legend.fancybox": False,
    "lines.linewidth": 1.4,
    "lines.markersize": 4.0,
    "text.color": PALETTE["ink"],
    "svg.fonttype": "none",
    "figure.dpi": 100,
    "savefig.dpi": 150,
}

#: A white outline that keeps region boundaries readable over dense clouds.
_HALO = [_patheffects.withStroke(linewidth=3.2, foreground="white", alpha=0.9)]

#: Largest number of trajectories given their own legend entry.
_LEGEND_TRAJECTORIES = 6


# ----------------------------------------------------------------------------------
# small helpers
# ----------------------------------------------------------------------------------


def _estimate_handle(label: str) -> Any:
    """Legend entry of the point-estimate marker (same look in every figure)."""
    from matplotlib.lines import Line2D

    return Line2D(
        [], [], marker="P", ms=8, ls="none", mfc=PALETTE["estimate"], mec="white", label=label
    )


def _plain(text: Any) -> str:
    """User text shown literally by matplotlib (a ``$`` never starts mathtext)."""
    return str(text).replace("$", r"\$")


def _names(fit: Any) -> Any:
    """The recording's user-supplied names, made safe for matplotlib text."""
    from types import SimpleNamespace

    rec = fit.recording
    return SimpleNamespace(
        channels=tuple(_plain(c) for c in rec.channels),
        units=tuple(None if u is None else _plain(u) for u in rec.units),
        time_unit=None if rec.time_unit is None else _plain(rec.time_unit),
        trajectory_names=tuple(_plain(n) for n in rec.trajectory_names),
    )


def _label(name: str, unit: str | None) -> str:
    return f"{name} [{unit}]" if unit else name


def _traj_colour(k: int) -> str:
    cols = PALETTE["trajectories"]
    return cols[k % len(cols)]


def _fmt(v: float) -> str:
    return f"{v:.3g}"


def _fmt_p(p: float) -> str:
    """A probability with two decimals that never rounds a non-zero value to 0 or 1."""
    if 0.0 < p < 0.005:
        return "< 0.01"
    if 0.995 <= p < 1.0:
        return "> 0.99"
    return f"{p:.2f}"


def _p_text(p: float) -> str:
    t = _fmt_p(p)
    return t if t[0] in "<>" else f"= {t}"


def _fmt_lambda(z: complex) -> str:
    if z.imag == 0:
        return _fmt(z.real)
    sign = "+" if z.imag > 0 else "-"
    return f"{_fmt(z.real)} {sign} {_fmt(abs(z.imag))}i"


def _note(ax: Any, text: str) -> None:
    """A small grey remark in the lower-left corner of an Axes (remarks stack)."""
    prev = getattr(ax, "_fitdyn_note", None)
    if prev is not None:
        prev.set_text(prev.get_text() + "\n" + text)
        return
    ax._fitdyn_note = ax.text(
        0.01,
        0.01,
        text,
        transform=ax.transAxes,
        fontsize=7.5,
        color=PALETTE["muted"],
        ha="left",
        va="bottom",
        style="italic",
        bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.5},
        zorder=20,
        wrap=True,
    )


def _chi2_radius(confidence: float) -> float:
    """Mahalanobis radius of a ``confidence`` region for 2 degrees of freedom.

    The chi-square quantile with 2 dof has the closed form ``-2 log(1 - p)``.
    """
    return float(np.sqrt(-2.0 * np.log1p(-confidence)))


def confidence_ellipse(
    points: np.ndarray, confidence: float = 0.95, n: int = 181
) -> np.ndarray | None:
    """Boundary of the normal-theory confidence ellipse of a 2-D point cloud.

    Parameters
    ----------
    points : ndarray, shape (B, 2)
        The cloud (rows with a non-finite entry are ignored).
    confidence : float
        Coverage of the region; the radius is the square root of the chi-square
        quantile with 2 degrees of freedom.
    n : int
        Number of boundary points.

    Returns
    -------
    ndarray, shape (n, 2), or None
        The closed boundary, or None when fewer than 3 finite points remain or the
        cloud's covariance is singular (a cloud on a line has no ellipse).
    """
    pts = np.asarray(points, dtype=float)
    pts = pts[np.all(np.isfinite(pts), axis=1)]
    if pts.shape[0] < 3:
        return None
    centre = pts.mean(axis=0)
    cov = np.cov(pts, rowvar=False)
    w, V = np.linalg.eigh(cov)
    if not np.all(np.isfinite(w)) or w[0] <= 1e-12 * max(w[1], 1e-300):
        return None
    theta = np.linspace(0.0, 2.0 * np.pi, n)
    circle = np.stack([np.cos(theta), np.sin(theta)], axis=1)
    return centre + _chi2_radius(confidence) * (circle * np.sqrt(w)) @ V.T


def _new_axes(ax: Any, figsize: tuple[float, float]) -> Any:
    import matplotlib.pyplot as plt

    if ax is not None:
        return ax
    fig = plt.figure(figsize=figsize, layout="constrained")
    return fig.add_subplot()


def _panel_axes(ax: Any, shape: tuple[int, int], figsize: tuple[float, float], **kw: Any):
    """Axes grid for a multi-panel kind.

    ``ax`` may be None (new Figure), a Figure/SubFigure to draw into, or a sequence
    of ``rows * cols`` Axes.
    """
    import matplotlib.pyplot as plt
    from matplotlib.figure import FigureBase

    rows, cols = shape
    if ax is None:
        fig = plt.figure(figsize=figsize, layout="constrained")
    elif isinstance(ax, FigureBase):
        fig = ax
    elif isinstance(ax, Sequence) or isinstance(ax, np.ndarray):
        axes = np.asarray(ax, dtype=object).reshape(rows, cols)
        return axes[0, 0].figure, axes
    else:
        raise TypeError(
            f"this figure has {rows * cols} panels: pass ax=None, a matplotlib Figure, "
            f"or a sequence of {rows * cols} Axes"
        )
    axes = fig.subplots(rows, cols, squeeze=False, **kw)
    return fig, axes


def _cloud_name(unc: Any) -> str:
    """What the uncertainty cloud's points are."""
    if str(getattr(unc, "scheme", "")).startswith("asymptotic"):
        return "delta-method draws"
    return "bootstrap replicates"


def _uncertainty_valid(fit: Any) -> Any:
    """The uncertainty object and its valid-replicate mask, or (None, None)."""
    unc = getattr(fit, "uncertainty", None)
    if unc is None:
        return None, None
    valid = np.asarray(getattr(unc, "valid", np.ones(len(unc.matrices), bool)), dtype=bool)
    return unc, valid


# ----------------------------------------------------------------------------------
# phase plane
# ----------------------------------------------------------------------------------
def _phase_limits(fit: Any, fine: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    vals = fit.recording.values
    lo = np.nanmin(vals, axis=0)
    hi = np.nanmax(vals, axis=0)
    span = np.where(hi > lo, hi - lo, np.maximum(np.abs(hi), 1.0))
    # fitted curves may leave the data box a little (e.g. an unstable start)
    for curve in fine:
        c = curve[np.all(np.isfinite(curve), axis=1)]
        if c.size:
            lo = np.minimum(lo, np.maximum(c.min(axis=0), lo - 0.25 * span))
            hi = np.maximum(hi, np.minimum(c.max(axis=0), hi + 0.25 * span))
    xs = fit.equilibrium
    if xs is not None and np.all(np.isfinite(xs)):
        near = np.all((xs > lo - 1.0 * span) & (xs < hi + 1.0 * span))
        if near:
            lo = np.minimum(lo, xs)
            hi = np.maximum(hi, xs)
    span = np.where(hi > lo, hi - lo, np.maximum(np.abs(hi), 1.0))
    return lo - 0.08 * span, hi + 0.08 * span


def _fine_curves(fit: Any, points: int) -> list[np.ndarray]:
    rec = fit.recording
    curves = []
    for k in range(rec.n_trajectories):
        t = rec.times[rec.trajectory == k]
        if t.size == 0:
            curves.append(np.empty((0, 2)))
            continue
        grid = np.linspace(t[0], t[-1], points)
        with np.errstate(over="ignore", invalid="ignore"):
            curves.append(np.asarray(fit.fitted(grid, trajectory=k), dtype=float))
    return curves


def _eigen_directions(fit: Any) -> list[tuple[np.ndarray, str, str, str]]:
    """Real eigen directions to draw: (vector, legend text, colour, linestyle)."""
    lam = np.asarray(fit.eigenvalues)
    if np.any(lam.imag != 0) or fit.label in ("stable star", "unstable star"):
        return []
    V = np.real(np.asarray(fit.eigenvectors))
    if fit.label in ("stable degenerate node", "unstable degenerate node"):
        return [
            (V[:, 0], f"eigen direction (repeated λ = {_fmt(lam[0].real)})", PALETTE["slow"], "-")
        ]
    order = np.argsort(np.abs(lam.real))  # slow first
    mixed = lam[0].real * lam[1].real < 0
    out = []
    for rank, k in enumerate(order):
        name = "slow" if rank == 0 else "fast"
        style = "-" if rank == 0 else (0, (6, 3))
        trend = (", growing" if lam[k].real > 0 else ", decaying") if mixed else ""
        text = f"{name} direction{trend} (λ = {_fmt(lam[k].real)})"
        out.append((V[:, k], text, PALETTE[name], style))
    return out


def _phase(
    fit: Any,
    ax: Any = None,
    *,
    field: str = "stream",
    points: int = 400,
    confidence: float | None = None,
) -> Any:
    """Phase-plane figure; see the module notes."""
    from matplotlib.lines import Line2D

    rec = fit.recording
    nm = _names(fit)
    ax = _new_axes(ax, (7.6, 5.6))
    fine = _fine_curves(fit, points)
    lo, hi = _phase_limits(fit, fine)
    A = np.asarray(fit.matrix, dtype=float)
    b = np.asarray(fit.offset, dtype=float)
    xs = fit.equilibrium
    handles: list[Any] = []

    # flow of the fitted matrix
    gx = np.linspace(lo[0], hi[0], 25)
    gy = np.linspace(lo[1], hi[1], 25)
    X, Y = np.meshgrid(gx, gy)
    U = A[0, 0] * X + A[0, 1] * Y + b[0]
    W = A[1, 0] * X + A[1, 1] * Y + b[1]
    if field == "stream":
        flow = ax.streamplot(
            gx, gy, U, W, density=0.9, color=PALETTE["flow"], linewidth=0.6, arrowsize=0.7, zorder=1
        )
        flow.lines.set_gid("flow")
    elif field == "arrows":
        norm = np.hypot(U / (hi[0] - lo[0]), W / (hi[1] - lo[1]))
        norm = np.where(norm > 0, norm, 1.0)
        ax.quiver(
            X,
            Y,
            U / norm,
            W / norm,
            color=PALETTE["flow"],
            angles="xy",
            pivot="mid",
            width=0.0025,
            zorder=1,
            gid="flow",
        )
    elif field != "none":
        raise ValueError(f"field must be 'stream', 'arrows' or 'none', got '{field}'")
    if field != "none":
        handles.append(Line2D([], [], color=PALETTE["flow"], lw=1.2, label="flow of fitted A"))

    # nullclines: a_i1 (x - x1*) + a_i2 (y - x2*) = 0, i.e. a_i1 x + a_i2 y + b_i = 0
    for i in range(2):
        a1, a2, bi = A[i, 0], A[i, 1], b[i]
        colour = PALETTE["nullcline"][i]
        text = f"{nm.channels[i]} nullcline"
        if abs(a2) > 1e-300 or abs(a1) > 1e-300:
            if abs(a2) >= abs(a1):
                p1 = (0.0, -bi / a2)
                p2 = (1.0, -(bi + a1) / a2)
            else:
                p1 = (-bi / a1, 0.0)
                p2 = (-(bi + a2) / a1, 1.0)
            ax.axline(
                p1,
                p2,
                color=colour,
                lw=1.0,
                ls=(0, (1.5, 2.0)),
                zorder=2,
                label=text,
                gid=f"nullcline-{i}",
            )
            handles.append(Line2D([], [], color=colour, lw=1.0, ls=(0, (1.5, 2.0)), label=text))

    # eigen directions through x*
    if xs is not None and np.all(np.isfinite(xs)):
        for v, text, colour, style in _eigen_directions(fit):
            ax.axline(
                tuple(xs),
                tuple(xs + v * np.hypot(*(hi - lo))),
                color=colour,
                lw=1.3,
                ls=style,
                zorder=3,
                alpha=0.9,
                label=text,
                gid="eigen-" + text.split()[0],
            )
            handles.append(Line2D([], [], color=colour, lw=1.3, ls=style, label=text))

    # data and fitted trajectories
    R = rec.n_trajectories
    for k in range(R):
        m = rec.trajectory == k
        colour = _traj_colour(k)
        pts = rec.values[m]
        flagged = rec.outlier[m]
        ax.plot(
            pts[~flagged, 0],
            pts[~flagged, 1],
            "o",
            ms=3.0,
            color=colour,
            alpha=0.55,
            mec="none",
            zorder=4,
            gid=f"data-{k}",
        )
        if fine[k].size:
            ax.plot(
                fine[k][:1, 0],
                fine[k][:1, 1],
                marker="o",
                ms=5.5,
                mfc="white",
                mec=colour,
                mew=1.4,
                ls="none",
                zorder=6,
                gid=f"start-{k}",
            )
            ax.plot(
                fine[k][:, 0], fine[k][:, 1], "-", color=colour, lw=1.5, zorder=5, gid=f"fitted-{k}"
            )
        if R <= _LEGEND_TRAJECTORIES:
            name = nm.trajectory_names[k]
            text = "data and fitted curve" if R == 1 else f"trajectory {name}"
            handles.append(
                Line2D([], [], color=colour, lw=1.5, marker="o", ms=3.5, mec="none", label=text)
            )
    if R > _LEGEND_TRAJECTORIES:
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["muted"],
                lw=1.5,
                marker="o",
                ms=3.5,
                mec="none",
                label=f"data and fitted curves ({R} trajectories)",
            )
        )
    handles.append(
        Line2D(
            [],
            [],
            marker="o",
            ms=5.5,
            mfc="white",
            mec=PALETTE["muted"],
            mew=1.4,
            ls="none",
            label="start of a fitted trajectory",
        )
    )
    n_out = int(np.count_nonzero(rec.outlier))
    if n_out:
        ax.plot(
            rec.values[rec.outlier, 0],
            rec.values[rec.outlier, 1],
            "x",
            ms=6.5,
            mew=1.6,
            color=PALETTE["outlier"],
            zorder=6,
            ls="none",
            gid="outliers",
        )
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["outlier"],
                marker="x",
                ms=6.5,
                mew=1.6,
                ls="none",
                label=f"flagged outlier ({n_out}, kept)",
            )
        )

    # equilibrium and its confidence region
    unc, valid = _uncertainty_valid(fit)
    if xs is not None and np.all(np.isfinite(xs)):
        if unc is not None and getattr(unc, "equilibria", None) is not None:
            conf = float(unc.confidence if confidence is None else confidence)
            cloud = np.asarray(unc.equilibria, dtype=float)[valid]
            ring = confidence_ellipse(cloud, conf)
            if ring is not None:
                ax.fill(ring[:, 0], ring[:, 1], color=PALETTE["region"], alpha=0.12, lw=0, zorder=6)
                ax.plot(
                    ring[:, 0],
                    ring[:, 1],
                    color=PALETTE["region"],
                    lw=1.1,
                    zorder=8,
                    gid="equilibrium-region",
                    path_effects=_HALO,
                )
                handles.append(
                    Line2D(
                        [],
                        [],
                        color=PALETTE["region"],
                        lw=1.0,
                        label=f"{100 * conf:.0f} % region of x*",
                    )
                )
        stable, stab_word = _stability_marker(fit)
        ax.plot(
            [xs[0]],
            [xs[1]],
            marker="D",
            ms=7.5,
            ls="none",
            zorder=7,
            gid="equilibrium",
            mfc=PALETTE["equilibrium"] if stable else "white",
            mec=PALETTE["equilibrium"],
            mew=1.6,
        )
        handles.append(
            Line2D(
                [],
                [],
                marker="D",
                ms=6.5,
                ls="none",
                mfc=PALETTE["equilibrium"] if stable else "white",
                mec=PALETTE["equilibrium"],
                mew=1.6,
                label=f"equilibrium x* ({stab_word})",
            )
        )

    ax.set_xlim(lo[0], hi[0])
    ax.set_ylim(lo[1], hi[1])
    ax.set_xlabel(_label(nm.channels[0], nm.units[0]))
    ax.set_ylabel(_label(nm.channels[1], nm.units[1]))
    ax.set_title(f"Phase plane: {_class_title(fit)}")
    notes = []
    if xs is None:
        notes.append("A is singular: no unique equilibrium")
    elif not np.all((xs >= lo) & (xs <= hi)):
        notes.append(f"x* = ({_fmt(xs[0])}, {_fmt(xs[1])}) lies outside this view")
    if unc is None:
        notes.append("no uncertainty analysis: no region for x*")
    if notes:
        _note(ax, "; ".join(notes))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    return ax


# ----------------------------------------------------------------------------------
# time series
# ----------------------------------------------------------------------------------
def _series(fit: Any, ax: Any = None, *, points: int = 400) -> Any:
    """Channels against time with fitted curves, residuals beneath; returns the Figure."""
    from matplotlib.lines import Line2D

    rec = fit.recording
    nm = _names(fit)
    fig, axes = _panel_axes(
        ax, (2, 2), (10.0, 5.8), sharex=True, gridspec_kw={"height_ratios": [3.0, 1.3]}
    )
    resid = np.asarray(fit.residuals(), dtype=float)
    tlabel = _label("time", nm.time_unit)
    R = rec.n_trajectories
    fine = _fine_curves(fit, points)
    for j in range(2):
        top, bottom = axes[0, j], axes[1, j]
        for k in range(R):
            m = rec.trajectory == k
            t = rec.times[m]
            y = rec.values[m, j]
            colour = _traj_colour(k)
            ok = ~rec.outlier[m]
            top.plot(
                t[ok], y[ok], "o", ms=2.6, color=colour, alpha=0.5, mec="none", gid=f"data-{k}"
            )
            if t.size:
                grid = np.linspace(t[0], t[-1], points)
                top.plot(grid, fine[k][:, j], "-", color=colour, lw=1.4, gid=f"fitted-{k}")
            bottom.plot(
                t[ok],
                resid[m, j][ok],
                "o",
                ms=2.2,
                color=colour,
                alpha=0.6,
                mec="none",
                gid=f"residual-{k}",
            )
        if np.any(rec.outlier):
            o = rec.outlier
            top.plot(
                rec.times[o],
                rec.values[o, j],
                "x",
                ms=6,
                mew=1.5,
                color=PALETTE["outlier"],
                ls="none",
                gid="outliers",
            )
            bottom.plot(
                rec.times[o], resid[o, j], "x", ms=6, mew=1.5, color=PALETTE["outlier"], ls="none"
            )
        eq = fit.equilibrium
        if eq is not None and np.isfinite(eq[j]):
            top.axhline(eq[j], color=PALETTE["equilibrium"], lw=0.9, ls=(0, (4, 3)))
        bottom.axhline(0.0, color=PALETTE["ink"], lw=0.8)
        unit = nm.units[j]
        top.set_ylabel(_label(nm.channels[j], unit))
        bottom.set_ylabel("residual" + (f" [{unit}]" if unit else ""))
        bottom.set_xlabel(tlabel)
        top.set_title(f"{nm.channels[j]} against time")
        # residual panel: symmetric limits around zero (outliers may go off-scale)
        r = resid[:, j][~rec.outlier & np.isfinite(resid[:, j])]
        if r.size:
            lim = 1.15 * float(np.max(np.abs(r))) or 1.0
            bottom.set_ylim(-lim, lim)
            off = int(np.count_nonzero(np.abs(resid[rec.outlier, j]) > lim))
            if off:
                _note(bottom, f"{off} flagged outlier residual(s) beyond this scale")
    handles = []
    if R <= _LEGEND_TRAJECTORIES:
        for k in range(R):
            text = "data and fitted curve" if R == 1 else f"trajectory {nm.trajectory_names[k]}"
            handles.append(
                Line2D(
                    [],
                    [],
                    color=_traj_colour(k),
                    marker="o",
                    ms=3.5,
                    mec="none",
                    lw=1.4,
                    label=text,
                )
            )
    else:
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["muted"],
                marker="o",
                ms=3.5,
                mec="none",
                lw=1.4,
                label=f"data and fitted curves ({R} trajectories)",
            )
        )
    if fit.equilibrium is not None:
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["equilibrium"],
                lw=0.9,
                ls=(0, (4, 3)),
                label="equilibrium level",
            )
        )
    if np.any(rec.outlier):
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["outlier"],
                marker="x",
                ls="none",
                ms=6,
                mew=1.5,
                label="flagged outlier (kept)",
            )
        )
    axes[0, 1].legend(handles=handles, loc="best")
    if hasattr(fig, "suptitle") and ax is None:
        fig.suptitle(
            "Measured and fitted time courses; residuals = data - fitted curve",
            x=0.01,
            ha="left",
            fontsize=10.5,
            fontweight="bold",
        )
    return fig


# ----------------------------------------------------------------------------------
# eigenvalue plane
# ----------------------------------------------------------------------------------
def _eigen(
    fit: Any, ax: Any = None, *, confidence: float | None = None, max_points: int = 4000
) -> Any:
    """Eigenvalue plane with the bootstrap cloud; returns the Axes."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    ax = _new_axes(ax, (7.2, 5.4))
    lam = np.asarray(fit.eigenvalues, dtype=complex)
    unc, valid = _uncertainty_valid(fit)
    handles: list[Any] = []
    colours = (PALETTE["cloud"], PALETTE["fast"])
    xs = [lam.real]
    ys = [lam.imag]
    cloud = None
    if unc is not None:
        conf = float(unc.confidence if confidence is None else confidence)
        cloud = np.asarray(unc.eigenvalues, dtype=complex)[valid]
        finite = np.all(np.isfinite(cloud), axis=1)
        cloud = cloud[finite]
        step = max(1, cloud.shape[0] // max_points)
        for k in range(2):
            c = cloud[::step, k]
            ax.scatter(
                c.real,
                c.imag,
                s=5,
                color=colours[k],
                alpha=0.18,
                lw=0,
                zorder=2,
                rasterized=True,
                gid=f"cloud-{k}",
            )
        is_real = cloud.imag == 0
        for k in range(2):
            re, im = cloud[:, k].real, cloud[:, k].imag
            cplx = ~is_real[:, k]
            if np.count_nonzero(cplx) >= 3:
                ring = confidence_ellipse(np.stack([re[cplx], im[cplx]], axis=1), conf)
                if ring is not None:
                    ax.plot(
                        ring[:, 0],
                        ring[:, 1],
                        color=colours[k],
                        lw=1.3,
                        zorder=3,
                        gid=f"region-{k}",
                        path_effects=_HALO,
                    )
            if np.count_nonzero(~cplx) >= 3:
                # real replicates: their confidence region is an interval on the real axis
                q = np.quantile(re[~cplx], [(1 - conf) / 2, (1 + conf) / 2])
                ax.plot(
                    q,
                    [0.0, 0.0],
                    color=colours[k],
                    lw=6.0,
                    alpha=0.45,
                    gid=f"interval-{k}",
                    solid_capstyle="butt",
                    zorder=3,
                )
                ax.plot(
                    q, [0.0, 0.0], ls="none", marker="|", ms=12, mew=1.6, color=colours[k], zorder=3
                )
            handles.append(
                Line2D(
                    [],
                    [],
                    color=colours[k],
                    lw=1.1,
                    marker="o",
                    ms=3,
                    mec="none",
                    label=f"λ{k + 1}: replicates, {100 * conf:.0f} % region",
                )
            )
        frac = float(np.mean(~is_real[:, 0])) if cloud.shape[0] else 0.0
        if 0.0 < frac < 1.0:
            _note(
                ax,
                f"{100 * frac:.0f} % of replicates have a complex pair; regions are "
                "drawn for the complex (ellipses) and the real (bars) replicates apart",
            )
        if cloud.size:
            lo_hi = np.quantile(cloud.real, [0.005, 0.995])
            im_hi = np.quantile(np.abs(cloud.imag), 0.995)
            xs.append(lo_hi)
            ys.append(np.array([im_hi, -im_hi]))
    for k in range(2):
        ax.plot(
            [lam[k].real],
            [lam[k].imag],
            marker="P",
            ms=9,
            ls="none",
            gid=f"estimate-{k}",
            mfc=PALETTE["estimate"],
            mec="white",
            mew=0.8,
            zorder=5,
        )
        ax.annotate(
            f"λ{k + 1} = {_fmt_lambda(complex(lam[k]))}",
            (lam[k].real, lam[k].imag),
            xytext=(7, 6 if lam[k].imag >= 0 else -12),
            textcoords="offset points",
            fontsize=8,
            color=PALETTE["ink"],
            zorder=6,
        )
    handles.insert(0, _estimate_handle("point estimate"))
    # limits: include 0 on both axes, symmetric imaginary range
    allx = np.concatenate([np.ravel(v) for v in xs] + [[0.0]])
    ally = np.abs(np.concatenate([np.ravel(v) for v in ys]))
    scale = max(float(np.max(np.abs(allx))), float(np.max(ally)), 1e-12)
    x0, x1 = float(allx.min()), float(allx.max())
    pad = 0.15 * max(x1 - x0, 0.25 * scale)
    x0, x1 = x0 - pad, x1 + pad
    if float(np.max(ally)) == 0.0:  # all real: a thin strip around the real axis
        ylim = 0.12 * (x1 - x0)
    else:
        ylim = max(1.2 * float(np.max(ally)), 0.25 * (x1 - x0))
    ax.set_xlim(x0, x1)
    ax.set_ylim(-ylim, ylim)
    ax.axvspan(
        0.0, x1 + abs(x1 - x0), color=PALETTE["unstable"], zorder=0, lw=0, gid="unstable-half-plane"
    )
    ax.axvline(0.0, color=PALETTE["ink"], lw=1.2, zorder=1, gid="stability-boundary")
    ax.axhline(0.0, color=PALETTE["muted"], lw=0.7, zorder=1)
    if x1 > 0:
        ax.text(
            0.008 * (x1 - x0),
            ylim * 0.95,
            "unstable half-plane",
            ha="left",
            va="top",
            rotation=90,
            fontsize=8,
            color=PALETTE["muted"],
            style="italic",
        )
    handles.append(
        Patch(
            facecolor=PALETTE["unstable"],
            edgecolor=PALETTE["ink"],
            lw=0.8,
            label="Re λ > 0 (unstable); boundary Re λ = 0",
        )
    )
    nm = _names(fit)
    unit = f" [1/{nm.time_unit}]" if nm.time_unit else ""
    ax.set_xlabel("Re λ" + unit)
    ax.set_ylabel("Im λ" + unit)
    title = "Eigenvalues"
    if unc is not None:
        title += f" ({unc.replicates} {_cloud_name(unc)})"
        n_bad = int(np.count_nonzero(~valid))
        if n_bad:
            _note(ax, f"{n_bad} replicate(s) without a valid fit not drawn")
    else:
        _note(ax, "no uncertainty analysis: point estimate only")
    ax.set_title(title)
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    return ax


# ----------------------------------------------------------------------------------
# trace-determinant plane
# ----------------------------------------------------------------------------------
def _td_limits(tau: np.ndarray, det: np.ndarray) -> tuple[float, float, float]:
    """Half-width T of the trace range, and the lower/upper determinant extents."""
    t_ext = float(np.max(np.abs(tau)))
    d_pos = float(np.max(np.maximum(det, 0.0)))
    d_neg = float(np.max(np.maximum(-det, 0.0)))
    T = max(1.3 * t_ext, 1.2 * np.sqrt(d_pos), 0.8 * np.sqrt(d_neg), 1e-12)
    D2 = max(1.3 * d_pos, 0.35 * T * T)
    D1 = max(1.3 * d_neg, 0.3 * D2)
    return T, D1, D2


def _tracedet(fit: Any, ax: Any = None, *, max_points: int = 4000) -> Any:
    """Trace-determinant plane with class regions and probabilities; returns the Axes."""
    from matplotlib.lines import Line2D

    ax = _new_axes(ax, (7.4, 5.6))
    tau0, det0 = fit.trace, fit.determinant
    unc, valid = _uncertainty_valid(fit)
    taus = [np.array([tau0])]
    dets = [np.array([det0])]
    ct = cd = None
    if unc is not None:
        M = np.asarray(unc.matrices, dtype=float)[valid]
        M = M[np.all(np.isfinite(M), axis=(1, 2))]
        ct = M[:, 0, 0] + M[:, 1, 1]
        cd = M[:, 0, 0] * M[:, 1, 1] - M[:, 0, 1] * M[:, 1, 0]
        if ct.size:
            taus.append(np.quantile(ct, [0.005, 0.995]))
            dets.append(np.quantile(cd, [0.005, 0.995]))
    T, D1, D2 = _td_limits(np.concatenate(taus), np.concatenate(dets))

    # regions
    tt = np.linspace(-T, T, 401)
    par = tt * tt / 4.0
    top = np.full_like(tt, D2)
    ax.fill_between(tt, -D1, 0.0, color=PALETTE["saddle"], lw=0, zorder=0)
    ax.fill_between(
        tt, 0.0, np.minimum(par, D2), where=tt <= 0, color=PALETTE["stable"], lw=0, zorder=0
    )
    ax.fill_between(
        tt, 0.0, np.minimum(par, D2), where=tt >= 0, color=PALETTE["unstable"], lw=0, zorder=0
    )
    ax.fill_between(
        tt,
        np.minimum(par, D2),
        top,
        where=tt <= 0,
        color=PALETTE["stable"],
        alpha=0.55,
        lw=0,
        zorder=0,
    )
    ax.fill_between(
        tt,
        np.minimum(par, D2),
        top,
        where=tt >= 0,
        color=PALETTE["unstable"],
        alpha=0.55,
        lw=0,
        zorder=0,
    )
    # boundaries: the trace axis (det = 0), the positive det axis (centres), the parabola
    ax.axhline(0.0, color=PALETTE["ink"], lw=1.1, zorder=1)
    ax.plot([0.0, 0.0], [0.0, D2], color=PALETTE["ink"], lw=1.1, zorder=1)
    ax.plot([0.0, 0.0], [-D1, 0.0], color=PALETTE["muted"], lw=0.6, zorder=1)
    ax.plot(
        tt,
        par,
        color=PALETTE["ink"],
        lw=1.1,
        ls=(0, (5, 2.5)),
        zorder=1,
        gid="parabola",
        label="parabola τ² = 4Δ",
    )

    probs = dict(getattr(unc, "class_probabilities", {}) or {}) if unc is not None else {}

    def text(label: str) -> str:
        if unc is None:
            return label
        return f"{label}\nP {_p_text(probs.get(label, 0.0))}"

    region_font = {
        "fontsize": 8.5,
        "ha": "center",
        "va": "center",
        "zorder": 2.5,
        "color": PALETTE["ink"],
        "fontweight": "bold",
    }
    box = {"facecolor": "white", "edgecolor": "none", "alpha": 0.65, "pad": 1.5}
    # label spots: several candidates per region; keep the one farthest from the
    # estimate and the cloud (distances in view-normalised units)
    obstacles = [np.array([[tau0, det0]])]
    if ct is not None and ct.size:
        pick = np.random.default_rng(0).choice(ct.size, size=min(ct.size, 400), replace=False)
        obstacles.append(np.stack([ct[pick], cd[pick]], axis=1))
    obst = np.concatenate(obstacles) / np.array([2.0 * T, D1 + D2])

    def best(cands: list[tuple[float, float]]) -> tuple[float, float]:
        c = np.asarray(cands) / np.array([2.0 * T, D1 + D2])
        d = np.min(np.hypot(*(c[:, None, :] - obst[None, :, :]).transpose(2, 0, 1)), axis=1)
        return cands[int(np.argmax(d))]

    def spiral_spots(sign: float) -> list[tuple[float, float]]:
        out = []
        for fd in (0.86, 0.62, 0.4):
            d = fd * D2
            tmax = min(T, 2.0 * np.sqrt(d))
            for ft in (0.5, 0.25, 0.75):
                out.append((sign * ft * tmax, d))
        return out

    def node_spots(sign: float) -> list[tuple[float, float]]:
        out = []
        for ft in (0.75, 0.6):
            t = ft * T
            for fd in (0.3, 0.6):
                out.append((sign * t, fd * min(t * t / 4.0, D2)))
        return out

    spots = {
        "saddle": best([(f * T, -g * D1) for g in (0.55, 0.3, 0.8) for f in (0.0, -0.5, 0.5)]),
        "stable spiral": best(spiral_spots(-1.0)),
        "unstable spiral": best(spiral_spots(1.0)),
        "stable node": best(node_spots(-1.0)),
        "unstable node": best(node_spots(1.0)),
    }
    region_texts = {}
    for label, (x, y) in spots.items():
        region_texts[label] = ax.text(
            x, y, text(label), bbox=box, gid=f"region-{label}", **region_font
        )
    # boundary classes: small labels on their curves, with a probability where given
    small = {"fontsize": 7.2, "color": PALETTE["muted"], "zorder": 8, "style": "italic"}

    # boundary classes get probabilities only under a practical-equivalence margin
    mprobs = dict(getattr(unc, "margin_probabilities", None) or {}) if unc is not None else {}

    def btext(label: str, extra: str) -> str:
        p = mprobs.get(label, probs.get(label))
        where = " within the margin" if label in mprobs else ""
        return f"{label} {extra}" + (f", P {_p_text(p)}{where}" if p else "")

    ax.text(0.015 * T, 0.97 * D2, btext("center", "(τ = 0)"), ha="left", va="top", **small)
    ax.text(
        0.98 * T,
        -0.02 * D1,
        btext("non-isolated equilibria", "(Δ = 0)"),
        ha="right",
        va="top",
        **small,
    )
    tp = 0.9 * min(T, 2.0 * np.sqrt(D2))
    ax.text(
        -tp,
        tp * tp / 4.0,
        "stars, degenerate nodes (τ² = 4Δ)",
        ha="left",
        va="bottom",
        rotation=0,
        **small,
    )

    # cloud and estimate
    handles: list[Any] = [
        Line2D([], [], color=PALETTE["ink"], lw=1.1, ls=(0, (5, 2.5)), label="parabola τ² = 4Δ")
    ]
    if ct is not None and ct.size:
        step = max(1, ct.size // max_points)
        ax.scatter(
            ct[::step],
            cd[::step],
            s=6,
            color=PALETTE["cloud"],
            alpha=0.35,
            lw=0,
            gid="cloud",
            zorder=3,
            rasterized=True,
        )
        outside = int(np.count_nonzero((np.abs(ct) > T) | (cd > D2) | (cd < -D1)))
        handles.append(
            Line2D(
                [],
                [],
                color=PALETTE["cloud"],
                marker="o",
                ms=3.5,
                ls="none",
                mec="none",
                label=f"{_cloud_name(unc)} ({ct.size})",
            )
        )
        if outside:
            _note(ax, f"{outside} replicate(s) outside this view")
    ax.plot(
        [tau0],
        [det0],
        marker="P",
        ms=10,
        ls="none",
        mfc=PALETTE["estimate"],
        gid="estimate",
        mec="white",
        mew=0.8,
        zorder=9,
    )
    handles.insert(0, _estimate_handle(f"point estimate: {fit.label}"))
    ax.set_xlim(-T, T)
    ax.set_ylim(-D1, D2)
    nm = _names(fit)
    tu = nm.time_unit
    ax.set_xlabel("trace τ" + (f" [1/{tu}]" if tu else ""))
    ax.set_ylabel("determinant Δ" + (f" [1/{tu}²]" if tu else ""))
    title = "Trace-determinant plane"
    if unc is not None:
        title += f": P(stable) {_p_text(float(unc.p_stable))}"
        failed = {k: v for k, v in probs.items() if k not in classify.LABELS and v > 0}
        for k, v in failed.items():
            _note(ax, f"{k}: {_fmt_p(v)} of the replicates (not drawn)")
    else:
        _note(ax, "no uncertainty analysis: point estimate only, no probabilities")
    ax.set_title(title)
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    ax.region_texts = region_texts  # for callers and tests: label -> Text artist
    return ax


# ----------------------------------------------------------------------------------
# residual diagnostics
# ----------------------------------------------------------------------------------
def _acf(x: np.ndarray, nlags: int) -> np.ndarray:
    """Sample autocorrelation ``r_k = sum (x_t - m)(x_{t+k} - m) / sum (x_t - m)^2``.

    The usual biased estimator (Box & Jenkins), the one the Ljung-Box statistic uses.
    """
    x = np.asarray(x, dtype=float)
    d = x - x.mean()
    denom = float(d @ d)
    L = min(int(nlags), x.size - 1)
    return np.array([1.0] + [float(d[:-k] @ d[k:]) / denom for k in range(1, L + 1)])


def _residuals(
    fit: Any, ax: Any = None, *, source: str = "estimate", nlags: int | None = None
) -> Any:
    """Residual autocorrelation per channel; returns the Figure."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    if source == "estimate":
        resid = np.asarray(fit.estimate.residuals, dtype=float)
        what = f"{fit.method} estimator residuals"
    elif source == "curve":
        resid = np.asarray(fit.residuals(), dtype=float)
        what = "data minus fitted curve"
    else:
        raise ValueError(f"source must be 'estimate' or 'curve', got '{source}'")
    resid = resid.reshape(resid.shape[0], -1)
    n = resid.shape[0]
    fig, axes = _panel_axes(ax, (1, 2), (10.0, 3.8), sharey=True)
    nm = _names(fit)
    L = int(nlags) if nlags is not None else max(1, min(24, n // 4))
    from fitdyn.diagnostics import whiteness_test

    # the same numbers the whiteness check reports (one function for both)
    white = whiteness_test(resid, fit.method if source == "estimate" else "")
    band = 1.96 / np.sqrt(max(n, 1))
    for j in range(2):
        a = axes[0, j]
        x = resid[:, j]
        x = x[np.isfinite(x)]
        if x.size < 4 or np.allclose(x, x[0]):
            _note(a, "too few or constant residuals: no autocorrelation")
            a.set_title(nm.channels[j])
            continue
        r = _acf(x, L)
        lags = np.arange(r.size)
        a.axhspan(-band, band, color=PALETTE["band"], lw=0, zorder=0, gid="band")
        a.axhline(0.0, color=PALETTE["ink"], lw=0.8, zorder=1)
        a.vlines(lags[1:], 0.0, r[1:], color=PALETTE["bars"], lw=2.2, zorder=2, gid="acf")
        a.plot(lags[1:], r[1:], "o", ms=3.2, color=PALETTE["bars"], zorder=3)
        outside = np.abs(r[1:]) > band
        if np.any(outside):
            a.plot(
                lags[1:][outside],
                r[1:][outside],
                "o",
                ms=4.5,
                mfc="white",
                mec=PALETTE["outlier"],
                mew=1.3,
                zorder=4,
                ls="none",
            )
        p = float(white.p_value[j])
        a.set_title(f"{nm.channels[j]}: Ljung-Box p = {p:.3g} ({white.describe()})")
        a.set_xlabel("lag (samples)")
        a.set_xlim(0.3, L + 0.7)
        a.set_ylim(min(-1.0, float(np.min(r)) - 0.05) if np.min(r) < -1 else -1.0, 1.0)
    axes[0, 0].set_ylabel("autocorrelation")
    handles = [
        Line2D([], [], color=PALETTE["bars"], marker="o", ms=3.2, lw=2.2, label="autocorrelation"),
        Patch(facecolor=PALETTE["band"], label=f"±1.96/√n (n = {n})"),
        Line2D(
            [],
            [],
            color=PALETTE["outlier"],
            marker="o",
            mfc="white",
            ls="none",
            label="outside the band",
        ),
    ]
    axes[0, 1].legend(handles=handles, loc="upper right")
    if ax is None:
        fig.suptitle(
            f"Residual autocorrelation ({what})",
            x=0.01,
            ha="left",
            fontsize=10.5,
            fontweight="bold",
        )
    return fig


# ----------------------------------------------------------------------------------
# entry point
# ----------------------------------------------------------------------------------
_DRAW = {
    "phase": _phase,
    "series": _series,
    "eigen": _eigen,
    "tracedet": _tracedet,
    "residuals": _residuals,
}


def _class_title(fit: Any) -> str:
    """The class as the verdict states it, so that a figure never reads more sure
    than the summary: the decided class, or the point class marked as such."""
    v = fit.verdict
    if v.not_reliable:
        return f"{fit.label} by the point estimate (not reliable: see the checks)"
    if not v.assessed:
        return f"{fit.label} (point estimate)"
    if v.label == "undetermined":
        return f"undetermined (point estimate: {fit.label})"
    return v.label


def _stability_marker(fit: Any) -> tuple[bool, str]:
    """Whether to fill the equilibrium marker, and the legend's word for it: filled
    only when the verdict is asymptotically stable at the confidence level (or, with
    no uncertainty analysis, when the point estimate is)."""
    v = fit.verdict
    if v.assessed and not v.not_reliable:
        return v.stability == "stable", {
            "stable": "stable",
            "unstable": "unstable",
        }.get(v.stability, "stability undetermined")
    point = fit.stability == classify.STABILITY[0]
    return point, ("stable" if point else "not stable") + " by the point estimate"


def plot(fit: Any, kind: str = "phase", ax: Any = None, **kwargs: Any) -> Any:
    """Draw one figure of a fit.

    Parameters
    ----------
    fit : Fit
        The result of :func:`fitdyn.fit`.
    kind : str
        One of :data:`KINDS`.
    ax : matplotlib Axes, Figure or sequence of Axes, optional
        Where to draw.  Single-panel kinds (``"phase"``, ``"eigen"``,
        ``"tracedet"``) take an Axes; multi-panel kinds take a Figure / SubFigure
        or a sequence of Axes (4 for ``"series"``: the two channels, then their
        residuals; 2 for ``"residuals"``).  By default a new figure is made.
    **kwargs
        Kind-specific options: ``phase``: ``field`` (``"stream"``, ``"arrows"``,
        ``"none"``), ``points`` (fine-grid size of the fitted curves),
        ``confidence`` (of the equilibrium region; default the uncertainty's);
        ``series``: ``points``; ``eigen``: ``confidence``, ``max_points`` (cloud
        points drawn); ``tracedet``: ``max_points``; ``residuals``: ``source``
        (``"estimate"``: the estimator's residuals, default; ``"curve"``: data minus
        fitted curve), ``nlags``.

    Returns
    -------
    matplotlib.figure.Figure
        For every kind: the top-level Figure drawn on (when ``ax`` is an Axes or a
        SubFigure, the Figure holding it); the panels are ``fig.axes``.

    Raises
    ------
    ValueError
        For an unknown kind.
    """
    if kind not in _DRAW:
        raise ValueError(f"unknown figure kind '{kind}'; choose one of: {', '.join(KINDS)}")
    import matplotlib

    with matplotlib.rc_context(STYLE):
        out = _DRAW[kind](fit, ax, **kwargs)
    return _root_figure(out)


def _root_figure(obj: Any) -> Any:
    """The top-level Figure of an Axes, SubFigure or Figure."""
    from matplotlib.figure import Figure

    fig = obj if hasattr(obj, "savefig") else obj.figure
    while not isinstance(fig, Figure):
        fig = fig.figure
    return fig
