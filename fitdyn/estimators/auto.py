"""Choose an estimator from the data, fit with it, and say why.

The policy (chosen with ``benchmarks/accuracy.py``; see its table):

1. Fit the integral form (fast, no derivatives, any sampling).  The lag-1
   autocorrelation of its residuals within segments separates the two noise
   types: measurement noise leaves them nearly white, process noise makes them a
   random walk (each row integrates all earlier disturbances).
2. Unless that autocorrelation already shows process noise beyond doubt, or the
   record is too long for a nonlinear fit, refine with the output-error
   ``trajectory`` fit, the maximum-likelihood estimate under measurement noise.
   Keep it when its own residuals are close to white (lag-1 autocorrelation and a
   Ljung-Box test over ten lags): the deterministic model then accounts for
   everything but independent measurement errors.  Process noise leaves slow
   wander in these residuals; the output-error fit would then report intervals
   far too narrow, so it is not used.
3. Otherwise process noise matters: use a one-step fit, exact for the sampled
   process -- the ``discrete`` fit on uniform steps, the ``prediction`` (one-step
   prediction-error) fit on irregular ones.  If its one-step residuals show
   measurement noise on top of the process noise, which biases one-step fits on the
   samples -- negative lag-1 autocorrelation, or a negative self-normalised lag-1 t
   statistic (:func:`lag1_t`, which keeps its scale on irregular steps), or a fitted
   mode that decays within a sampling step (sensor noise absorbed as an instant
   decay, whose residuals then look white) -- use instead the
   ``instrumental`` one-step fit (earlier samples as instruments, consistent under
   both noises; its bias-corrected parametric bootstrap is the calibrated one in
   the benchmark's "mixed" scenario) on uniform steps, and on irregular steps (or
   when the uniform-step fit refuses: no real logarithm) the ``nonlinear-iv`` fit,
   the same instruments with ``expm(A h_k)`` on each step (calibrated in the
   benchmark's "irregular-mixed" scenario).  Only if that fails too, the
   ``derivative`` regression with smoothed states, which averages the measurement
   noise but whose intervals are then too narrow (a warning says so).
4. If that fails too (too few samples per segment), keep the integral form.

Every decision and the numbers behind it go into the Estimate's notes; its settings
carry ``chosen_by = "auto"``.  The choice is deterministic.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import FitdynError, NoRealLogarithmError, SamplingError
from fitdyn.estimators.base import Estimate, Estimator
from fitdyn.recording import Recording

__all__ = ["choose_and_fit", "residual_lag1", "lag1_t", "ljung_box_p", "AUTO_SETTINGS"]

#: The policy's own settings and their defaults.
AUTO_SETTINGS: dict[str, Any] = {
    # integral residual lag-1 autocorrelation above which process noise is certain
    "process_noise_lag1": 0.95,
    # output-error residual lag-1 autocorrelation up to which the trajectory fit is kept
    # (independent sensor noise gives about 0 +- 1/sqrt(n); at 0.5, 2 % of 50-sample
    # records with process noise passed and their intervals missed the truth)
    "white_lag1": 0.3,
    # samples above which the nonlinear trajectory fit is skipped
    "max_trajectory_samples": 20000,
    # Ljung-Box p-value (smaller of the two channels) below which the output-error
    # residuals are not white: process noise is present and the trajectory fit, which
    # ignores it, would report intervals that are too narrow
    "whiteness_p": 1e-4,
    # lags of that test
    "whiteness_lags": 10,
    # one-step residuals: the smaller of the channels' self-normalised lag-1 t
    # statistics below which measurement noise is taken to be present (one-sided,
    # about 0.3 % false alarms for independent errors, the smaller of two; at -2.5,
    # 1-4 % of the process-noise-only records were sent to an instrumental fit)
    "sensor_t": -3.0,
    # one-step fits whose fastest |Re lambda| times the median step exceeds this have
    # absorbed sensor noise as a mode that decays within a step
    "fast_mode": 3.0,
    # wall-clock seconds the diagnostic output-error fit may take (its iterations are
    # capped too); a fit that does not converge within them is not used
    "diagnostic_seconds": 2.0,
}


#: margin above ``white_lag1`` beyond which the diagnostic output-error fit stops
#: after its first stage (common practice, no source: five times the largest change
#: its weighting rounds made, measured on 415 records of the accuracy and coverage
#: benchmarks)
SCREEN_MARGIN = 0.4


def residual_lag1(residuals: np.ndarray, segment: np.ndarray) -> float:
    """Lag-1 autocorrelation of residuals within segments, averaged over channels.

    Parameters
    ----------
    residuals : ndarray, shape (m, 2)
    segment : int ndarray, shape (m,)
        Segment of each residual row; pairs never cross segments.

    Returns
    -------
    float
        NaN when fewer than three within-segment pairs exist.
    """
    r = np.asarray(residuals, dtype=float)
    seg = np.asarray(segment)
    same = seg[1:] == seg[:-1]
    if int(same.sum()) < 3:
        return float("nan")
    r = r - r.mean(axis=0)
    num = np.sum(r[1:][same] * r[:-1][same], axis=0)
    den = np.sum(r * r, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
    return float(np.nanmean(rho)) if np.any(np.isfinite(rho)) else float("nan")


def lag1_t(residuals: np.ndarray, segment: np.ndarray) -> float:
    """The smaller of the channels' self-normalised lag-1 t statistics.

    For channel ``c`` the products ``p_k = r_{k+1,c} r_{k,c}`` of neighbouring
    residuals within segments have mean zero when the residuals are independent
    (a martingale difference sequence), so ``t = sum p_k / sqrt(sum p_k^2)`` is
    close to standard normal whatever the residuals' variances; sensor noise on
    one-step errors makes their mean negative.  Unlike the correlation, the
    statistic keeps its scale when the variances differ from step to step
    (irregular steps).

    Parameters
    ----------
    residuals : ndarray, shape (m, 2)
    segment : int ndarray, shape (m,)

    Returns
    -------
    float
        NaN when fewer than three within-segment pairs exist.
    """
    r = np.asarray(residuals, dtype=float)
    seg = np.asarray(segment)
    same = seg[1:] == seg[:-1]
    if int(same.sum()) < 3:
        return float("nan")
    p = (r[1:] * r[:-1])[same]
    den = np.sqrt(np.sum(p * p, axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(den > 0, p.sum(axis=0) / np.where(den > 0, den, 1.0), np.nan)
    return float(np.nanmin(t)) if np.any(np.isfinite(t)) else float("nan")


def ljung_box_p(residuals: np.ndarray, segment: np.ndarray, lags: int = 10) -> np.ndarray:
    """Ljung-Box p-value of each residual channel, autocorrelations pooled within segments.

    ``Q = n (n + 2) sum_{k=1}^{L} r_k^2 / (n - k)`` referred to chi-square with ``L``
    degrees of freedom (Ljung & Box, Biometrika 1978), where ``r_k`` pools the lag-k
    products of every segment (pairs never cross segments or trajectories).

    Parameters
    ----------
    residuals : ndarray, shape (m, 2)
    segment : int ndarray, shape (m,)
    lags : int
        Number of lags ``L`` (reduced to a fifth of the rows for short records).

    Returns
    -------
    ndarray, shape (2,)
        NaN where the test cannot be made.
    """
    from scipy.special import chdtrc  # the chi-square tail (scipy.stats is slow to load)

    r = np.asarray(residuals, dtype=float)
    seg = np.asarray(segment)
    n = r.shape[0]
    L = int(min(lags, n // 5))
    if L < 1:
        return np.full(r.shape[1], np.nan)
    r = r - r.mean(axis=0)
    den = np.sum(r * r, axis=0)
    q = np.zeros(r.shape[1])
    for k in range(1, L + 1):
        same = seg[k:] == seg[:-k]
        num = np.sum(r[k:][same] * r[:-k][same], axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            rk = num / den
        q += rk * rk / (n - k)
    q *= n * (n + 2)
    return np.where(den > 0, chdtrc(L, q), np.nan)


def _make(method: str, settings: dict[str, Any], **defaults: Any) -> tuple[Estimator, list[str]]:
    """An estimator with the user's settings that apply to it (``defaults`` where the
    user gave none); the rest are named."""
    from fitdyn.estimators import get_estimator

    allowed = {
        "derivative": ("derivative", "smooth_states", "window", "polyorder"),
        "integral": (),
        "discrete": ("jitter_tolerance",),
        "instrumental": ("jitter_tolerance", "lags"),
        "trajectory": (
            "start",
            "weights",
            "noise_sd",
            "frequencies",
            "max_iterations",
            "xtol",
            "time_budget",
        ),
        "prediction": ("weighting", "frequencies", "max_iterations", "xtol"),
        "nonlinear-iv": ("noise", "frequencies", "max_iterations", "xtol"),
    }[method]
    use = {k: v for k, v in settings.items() if k in allowed}
    ignored = sorted(k for k in settings if k not in allowed)
    return get_estimator(method, **{**defaults, **use}), ignored


def _pairs(rec: Recording) -> tuple[np.ndarray, np.ndarray]:
    """Segment and step of each pair of consecutive samples within a segment."""
    seg = np.asarray(rec.segment)
    same = seg[1:] == seg[:-1]
    return seg[1:][same], np.diff(rec.times)[same]


def _instrumental(
    rec: Recording,
    eq: np.ndarray | None,
    settings: dict[str, Any],
    reasons: list[str],
    uniform: bool,
) -> tuple[tuple[Estimate, Estimator] | None, list[str]]:
    """The instrumental-variable one-step fit, or None with the reasons recorded.

    The two-stage least-squares fit on uniform steps; the nonlinear one on
    irregular steps or when the former refuses.
    """
    names = ("instrumental", "nonlinear-iv") if uniform else ("nonlinear-iv",)
    for name in names:
        iv, ignored = _make(name, settings)
        try:
            est = iv.fit(rec, eq)
        except FitdynError as exc:
            reasons.append(f"auto: instrumental-variable fit '{name}' refused ({exc})")
            continue
        steps = "uniform steps" if name == "instrumental" else "expm(A h) on every step"
        reasons.append(
            "auto: process and measurement noise together -> one-step fit with earlier "
            f"samples as instruments, '{name}' ({steps}; consistent under both noises)"
        )
        return (est, iv), ignored
    return None, []


def choose_and_fit(
    rec: Recording, equilibrium: np.ndarray | None = None, **settings: Any
) -> tuple[Estimate, Estimator]:
    """Pick an estimator for a recording, fit it and record the reasons.

    Parameters
    ----------
    rec : Recording
    equilibrium : ndarray, shape (2,), optional
        A known equilibrium.
    **settings
        The policy's own settings (:data:`AUTO_SETTINGS`) and settings of the
        individual estimators, passed to the chosen one where they apply (the
        others are listed in the notes).

    Returns
    -------
    estimate : Estimate
        The chosen estimator's result with the reasons added to its notes and
        ``settings["chosen_by"] = "auto"``.
    estimator : Estimator
        The chosen estimator instance.
    """
    policy = dict(AUTO_SETTINGS)
    for k in list(settings):
        if k in AUTO_SETTINGS:
            policy[k] = settings.pop(k)
    eq = None if equilibrium is None else np.asarray(equilibrium, dtype=float).reshape(2)
    samp = rec.sampling()
    n = rec.n_samples
    steps = "uniform steps"
    if not samp["uniform"]:
        steps = "irregular steps"
        if np.isfinite(samp["jitter"]):
            steps += f" (largest deviation from the median step {100 * samp['jitter']:.3g} %)"
    reasons = [f"auto: {n} samples in {rec.n_trajectories} trajectory(ies), {steps}"]

    integ, ignored_i = _make("integral", settings)
    base: Estimate | None = None
    base_error: FitdynError | None = None
    try:
        base = integ.fit(rec, eq)
    except FitdynError as exc:
        base_error = exc
        lag_int = float("nan")
        reasons.append(f"auto: integral form failed ({exc})")
    else:
        lag_int = residual_lag1(base.residuals, rec.segment)
        reasons.append(
            f"auto: integral-form residual lag-1 autocorrelation {lag_int:.2f} "
            f"(process-noise limit {policy['process_noise_lag1']:g})"
        )
    chosen: tuple[Estimate, Estimator] | None = None
    ignored: list[str] = ignored_i
    process = bool(np.isfinite(lag_int) and lag_int > policy["process_noise_lag1"])
    if process:
        reasons.append("auto: residuals behave like a random walk -> process noise dominates")
    elif n > policy["max_trajectory_samples"]:
        reasons.append(
            f"auto: more than {policy['max_trajectory_samples']} samples -> "
            "no nonlinear trajectory fit"
        )
        process = True
    else:
        # the diagnostic fit runs with a short time budget (and its iteration caps):
        # a diverging or misfitting record costs at most that, then counts as failed
        diag, _ = _make("trajectory", settings, time_budget=policy["diagnostic_seconds"])
        # residuals far from white at the fit's first stage cannot become white by
        # its weighting rounds (which moved the lag-1 by at most 0.08 on the
        # benchmarks' records): those rounds are skipped
        diag._screen_lag1 = policy["white_lag1"] + SCREEN_MARGIN
        try:
            est_t = diag.fit(rec, eq)
        except FitdynError as exc:
            reasons.append(f"auto: trajectory fit failed ({exc}); not used")
            process = True
        else:
            converged = bool(est_t.extra.get("success", True))
            lag_t = residual_lag1(est_t.residuals, rec.segment)
            p_white = ljung_box_p(est_t.residuals, rec.segment, policy["whiteness_lags"])
            p_min = float(np.nanmin(p_white)) if np.any(np.isfinite(p_white)) else np.nan
            white_lag = not np.isfinite(lag_t) or lag_t <= policy["white_lag1"]
            white_lb = not np.isfinite(p_min) or p_min >= policy["whiteness_p"]
            if not converged:
                reasons.append(
                    "auto: trajectory fit did not converge within its iteration cap or "
                    f"{policy['diagnostic_seconds']:g} s; not used"
                )
                process = True
            elif white_lag and white_lb:
                reasons.append(
                    f"auto: trajectory-fit residuals close to white (lag-1 {lag_t:.2f} <= "
                    f"{policy['white_lag1']:g}, Ljung-Box p {p_min:.2g} >= "
                    f"{policy['whiteness_p']:g}) -> measurement noise dominates; the "
                    "output-error fit is its maximum-likelihood estimate"
                )
                # the estimator that is returned (and bootstraps) has the user's own
                # time budget; it starts its refits from the diagnostic point estimate
                traj, ignored_t = _make("trajectory", settings)
                traj._reference = getattr(diag, "_reference", None)
                budget = {"time_budget": traj.settings["time_budget"]}
                est_t = replace(est_t, settings={**est_t.settings, **budget})
                chosen, ignored = (est_t, traj), ignored_t
            else:
                reasons.append(
                    f"auto: trajectory-fit residuals not white (lag-1 {lag_t:.2f}, "
                    f"Ljung-Box p {p_min:.2g}) -> process noise matters; the output-error "
                    "fit ignores it and would understate the uncertainty"
                )
                process = True
    mixed_noise = False
    if chosen is None:
        # the one-step fit: exact for the sampled process on any steps
        name = "discrete" if samp["uniform"] else "prediction"
        what = "discrete fit" if samp["uniform"] else "prediction-error fit"
        one, ignored_o = _make(name, settings)
        try:
            est_o = one.fit(rec, eq)
        except (NoRealLogarithmError, SamplingError) as exc:
            reasons.append(f"auto: one-step {what} refused ({exc})")
        except (ImportError, FitdynError) as exc:
            reasons.append(f"auto: one-step {what} unavailable ({exc})")
        else:
            seg_o, h_o = _pairs(rec)
            # raw one-step errors (the prediction-error fit reports them divided by
            # sqrt(h)): measurement noise shows as negative lag-1 correlation in them
            raw = np.asarray(est_o.residuals, dtype=float)
            if name == "prediction" and raw.shape[0] == h_o.size:
                raw = raw * np.sqrt(h_o)[:, None]
            lag_o = residual_lag1(raw, seg_o)
            limit = -max(0.1, 2.5 / np.sqrt(max(est_o.n_used, 1)))
            t_o = lag1_t(raw, seg_o)
            fast = float(np.max(np.abs(linalg2.eigvals(est_o.matrix).real)) * np.median(h_o))
            signs = []
            if np.isfinite(lag_o) and lag_o < limit:
                signs.append(f"lag-1 autocorrelation {lag_o:.2f} < {limit:.2f}")
            if np.isfinite(t_o) and t_o < policy["sensor_t"]:
                signs.append(f"lag-1 products' t statistic {t_o:.2f} < {policy['sensor_t']:g}")
            if fast > policy["fast_mode"]:
                signs.append(
                    f"a mode faster than the sampling resolves (|Re lambda| x median step "
                    f"{fast:.3g} > {policy['fast_mode']:g}: sensor noise absorbed as an "
                    "instant decay)"
                )
            if signs:
                reasons.append(
                    f"auto: one-step residuals show measurement noise ({'; '.join(signs)}) "
                    "-> measurement noise as well; a one-step fit on the samples is "
                    "attenuated, not used"
                )
                if process:
                    chosen, ignored = _instrumental(rec, eq, settings, reasons, samp["uniform"])
                mixed_noise = process and chosen is None
            else:
                steps_text = "uniform steps" if samp["uniform"] else "irregular steps"
                reasons.append(
                    f"auto: {steps_text}, one-step residuals close to white (lag-1 "
                    f"{lag_o:.2f}) -> one-step {what}"
                )
                chosen, ignored = (est_o, one), ignored_o
    if chosen is None:
        deriv, ignored_v = _make("derivative", settings)
        try:
            chosen, ignored = (deriv.fit(rec, eq), deriv), ignored_v
            reasons.append("auto: derivative regression with smoothed states")
        except FitdynError as exc:
            reasons.append(f"auto: derivative regression failed ({exc})")
    if chosen is None:
        if base is None:
            assert base_error is not None
            raise base_error
        reasons.append("auto: keeping the integral form")
        chosen, ignored = (base, integ), ignored_i
    est, estimator = chosen
    if ignored:
        reasons.append(f"auto: settings not used by '{est.method}': {', '.join(ignored)}")
    new_settings = dict(est.settings)
    new_settings["chosen_by"] = "auto"
    warns = tuple(est.warnings)
    if mixed_noise:
        warns += (
            "both process noise and measurement noise appear to be present, and the "
            "instrumental-variable fits that handle that mix could not be used here (see "
            "the notes); in simulations of such data the derivative regression's nominal "
            "95 % intervals covered the truth only 0.80-0.91 of the time (0.55 in a "
            "stronger mix): treat them as too narrow",
        )
    est = replace(
        est, notes=tuple(reasons) + tuple(est.notes), settings=new_settings, warnings=warns
    )
    return est, estimator
