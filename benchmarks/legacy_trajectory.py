"""The output-error fit as it was before the batched solver, for benchmarks only.

This is the previous ``fitdyn.estimators.trajectory`` module unchanged except for the
class name (``LmfitTrajectoryEstimator``): lmfit, one replicate at a time.
``benchmarks/trajectory_speed.py`` measures it against the batched fit in the same
run.  It is not part of the package and is not maintained beyond that use.

Original module notes
---------------------
Output-error fit: the solution of the linear model fitted to the samples.

The model of trajectory ``r`` (first sample at ``t0_r``) is

    x(t) = x* + expm(A (t - t0_r)) (x0_r - x*),

with ``A`` and the equilibrium ``x*`` shared by all trajectories and one starting
state ``x0_r`` per trajectory (per trajectory, not per segment: the solution runs
through gaps, so gaps need no special care, and irregular times are natural).  The
parameters minimise the weighted squared differences between the samples and the
model by nonlinear least squares (:func:`lmfit.minimize` with
``method="least_squares"``, i.e. :func:`scipy.optimize.least_squares`).  Under
independent Gaussian measurement noise with known per-channel variances this is the
maximum-likelihood estimate (Ljung, *System Identification*, 2nd ed., 1999,
output-error models; Bard, *Nonlinear Parameter Estimation*, 1974).  It ignores
process noise: with strong process noise the residuals are autocorrelated and the
fit says so in its warnings.

Details
-------
* The problem is solved in internal units: each channel centred and divided by its
  standard deviation, times divided by the longest trajectory span.  The result is
  mapped back exactly, so rescaling a channel or shifting time changes nothing.
* Weights are per channel: by default ``1 / sd`` of each channel's residuals from a
  first fit weighted by the channels' spreads (two stages); ``weights=(w1, w2)``
  fixes them; ``noise_sd=(s1, s2)`` fixes them to ``1 / s`` and declares the noise
  known (the covariance is then not scaled by the reduced chi-square).
* Starting values come from the integral estimator (its fitted segment starting
  states give ``x0_r``); for oscillatory starts (complex eigenvalues) extra starts
  scale the frequency ``|Im lambda|`` by ``frequencies``, because the output-error
  cost has local minima at other frequencies.  The lowest cost wins.
* When the starting ``A`` is (nearly) singular the equilibrium is not defined, so
  the model is parameterised by ``b`` (``x(t) = expm(A tau) x0 + int_0^tau expm(A s)
  ds b``, the integral by :func:`fitdyn.linalg2.expm_integral`) instead of ``x*``.
* The covariance of ``(a11, a12, a21, a22, b1, b2)`` is lmfit's (the inverse of
  ``J'J``) mapped by the delta method (``b = -A x*``).  When it is singular or
  unavailable the unidentified parameters (right singular vectors of the Jacobian
  with negligible singular values) are named in the warnings and ``param_cov`` is
  ``None``; the fit never fails for that reason.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import EstimationError, FitdynError, TooFewSamplesError
from fitdyn.estimators.auto import residual_lag1
from fitdyn.estimators.base import Estimate, NonlinearEstimator, SystemBatch
from fitdyn.estimators.derivative import check_equilibrium, reject_unknown, replicate_values
from fitdyn.recording import Recording

__all__ = ["LmfitTrajectoryEstimator"]

_BIG = 1e100  # residuals are clipped here so that an overflowing trial step stays finite
_SINGULAR = 1e-3  # |det A| <= this * max|lambda|^2 (internal units): parameterise by b
_PROJECTION_LIMIT = 2_000_000  # largest (values x linear parameters) for the start search
_REWEIGHT_ROUNDS = 8  # at most this many weighted fits while the weights settle


@dataclass
class _Problem:
    """Data of one output-error problem in internal units."""

    tau: np.ndarray  # (n,) time since the trajectory's first sample, internal units
    traj: np.ndarray  # (n,) trajectory index
    y: np.ndarray  # (n, 2) scaled samples
    n_traj: int
    mu: np.ndarray  # (2,) channel centres
    sd: np.ndarray  # (2,) channel scales
    T: float  # time scale
    eq: np.ndarray | None  # known equilibrium, internal units

    def to_internal_A(self, A: np.ndarray) -> np.ndarray:
        return self.T * (A * self.sd[None, :]) / self.sd[:, None]

    def to_original_A(self, A: np.ndarray) -> np.ndarray:
        return (A * self.sd[:, None]) / self.sd[None, :] / self.T


def _names(n_traj: int, kind: str) -> list[str]:
    v = ["xs1", "xs2"] if kind == "equilibrium" else (["b1", "b2"] if kind == "offset" else [])
    x0 = [f"x0_{r + 1}_{j}" for r in range(n_traj) for j in (1, 2)]
    return ["a11", "a12", "a21", "a22", *v, *x0]


def _split(theta: np.ndarray, prob: _Problem, kind: str):
    A = theta[:4].reshape(2, 2)
    if kind == "known":
        v = prob.eq
        x0 = theta[4:].reshape(prob.n_traj, 2)
    else:
        v = theta[4:6]
        x0 = theta[6:].reshape(prob.n_traj, 2)
    return A, v, x0


def _model(theta: np.ndarray, prob: _Problem, kind: str) -> np.ndarray:
    """Model values (n, 2) in internal units."""
    A, v, x0 = _split(theta, prob, kind)
    start = x0[prob.traj]
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        if kind == "offset":
            E = linalg2.expm(A, prob.tau)
            G = linalg2.expm_integral(A, prob.tau)
            return np.einsum("nij,nj->ni", E, start) + np.einsum("nij,j->ni", G, v)
        F = linalg2.expm(A, prob.tau)
        return v + np.einsum("nij,nj->ni", F, start - v)


def _residual(theta: np.ndarray, prob: _Problem, kind: str, w: np.ndarray) -> np.ndarray:
    r = (prob.y - _model(theta, prob, kind)) * w
    r = np.nan_to_num(r, nan=_BIG, posinf=_BIG, neginf=-_BIG)
    return np.clip(r, -_BIG, _BIG).ravel()


def _linear_part(A: np.ndarray, prob: _Problem, kind: str) -> tuple[np.ndarray, np.ndarray]:
    """For a given ``A`` the model is linear in the other parameters: ``y0 + M p``.

    Returns ``y0`` (n, 2) and ``M`` (n, 2, P) with ``p = (x0_1, ..., x0_R[, v])``
    where ``v`` is ``x*`` (kind ``"equilibrium"``) or ``b`` (kind ``"offset"``).
    """
    n = prob.tau.size
    R = prob.n_traj
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        if kind == "offset":
            E = linalg2.expm(A, prob.tau)
            G = linalg2.expm_integral(A, prob.tau)
        else:
            E = linalg2.expm(A, prob.tau)
            G = np.eye(2) - E
    P = 2 * R + (0 if kind == "known" else 2)
    M = np.zeros((n, 2, P))
    rows = np.arange(n)
    for k in range(2):
        M[rows, :, 2 * prob.traj + k] = E[:, :, k]
    y0 = np.zeros((n, 2))
    if kind == "known":
        y0 = np.einsum("nij,j->ni", G, prob.eq)
    else:
        M[:, :, 2 * R :] = G
    return y0, M


def _project(
    a: np.ndarray, prob: _Problem, kind: str, w: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Variable projection: best linear parameters for ``A`` and the weighted residual."""
    A = a.reshape(2, 2)
    y0, M = _linear_part(A, prob, kind)
    Mw = (M * w[None, :, None]).reshape(-1, M.shape[-1])
    yw = ((prob.y - y0) * w).ravel()
    if not (np.all(np.isfinite(Mw)) and np.all(np.isfinite(yw))):
        return np.zeros(M.shape[-1]), np.full(yw.size, _BIG)
    lin, *_ = np.linalg.lstsq(Mw, yw, rcond=None)
    r = np.clip(yw - Mw @ lin, -_BIG, _BIG)
    return lin, r


def _full_theta(a: np.ndarray, lin: np.ndarray, prob: _Problem, kind: str) -> np.ndarray:
    """Parameter vector (a, v, x0) from ``a`` and the projected linear parameters."""
    R = prob.n_traj
    x0 = lin[: 2 * R]
    v = lin[2 * R :]
    return np.concatenate([a, v, x0])


class LmfitTrajectoryEstimator(NonlinearEstimator):
    """Output-error (trajectory-matching) fit with lmfit.

    Parameters
    ----------
    start : {"integral", "derivative", "both"}
        Which fast estimator(s) give the starting values (default ``"integral"``).
    weights : pair of float, optional
        Fixed per-channel residual weights (in 1 / channel units).
    noise_sd : pair of float, optional
        Known measurement noise standard deviations; implies ``weights = 1 / noise_sd``
        and an unscaled covariance.
    frequencies : sequence of float
        Factors applied to the starting estimate's ``|Im lambda|`` for the extra
        starts on oscillatory data (default ``(0.5, 0.75, 1.5, 2.0)``; empty for
        none).
    max_nfev : int, optional
        Evaluation limit of each lmfit fit (lmfit's default when ``None``); the
        4-parameter start search stops at 200 evaluations per start.
    tol : float
        ``ftol``, ``xtol`` and ``gtol`` of :func:`scipy.optimize.least_squares`
        (default 1e-10).
    """

    name = "trajectory"
    needs_uniform_steps = False

    def __init__(
        self,
        start: str = "integral",
        weights: Any = None,
        noise_sd: Any = None,
        frequencies: Any = (0.5, 0.75, 1.5, 2.0),
        max_nfev: int | None = None,
        tol: float = 1e-10,
        **unknown: Any,
    ) -> None:
        reject_unknown(
            self.name,
            unknown,
            ("start", "weights", "noise_sd", "frequencies", "max_nfev", "tol"),
        )
        if start not in ("integral", "derivative", "both"):
            raise EstimationError(
                f"start must be 'integral', 'derivative' or 'both', got {start!r}"
            )
        if weights is not None and noise_sd is not None:
            raise EstimationError("give weights or noise_sd, not both")
        for label, val in (("weights", weights), ("noise_sd", noise_sd)):
            if val is not None:
                arr = np.asarray(val, dtype=float).reshape(-1)
                if arr.size == 1:
                    arr = np.repeat(arr, 2)
                if arr.shape != (2,) or not np.all(np.isfinite(arr)) or np.any(arr <= 0):
                    raise EstimationError(
                        f"{label} must be one or two positive numbers (one per channel), "
                        f"got {np.asarray(val).tolist()}"
                    )
                if label == "weights":
                    weights = tuple(float(v) for v in arr)
                else:
                    noise_sd = tuple(float(v) for v in arr)
        freqs = tuple(float(f) for f in frequencies)
        if any(not np.isfinite(f) or f <= 0 for f in freqs):
            raise EstimationError(f"frequencies must be positive factors, got {list(freqs)}")
        super().__init__(
            start=start,
            weights=weights,
            noise_sd=noise_sd,
            frequencies=freqs,
            max_nfev=max_nfev,
            tol=float(tol),
        )
        self._reference: dict[str, Any] | None = None

    # -- the problem ------------------------------------------------------------------------
    def _problem(self, rec: Recording, values: np.ndarray, eq: np.ndarray | None) -> _Problem:
        t = np.asarray(rec.times, dtype=float)
        traj = np.asarray(rec.trajectory, dtype=np.int64)
        R = rec.n_trajectories
        first = np.full(R, np.nan)
        for r in range(R):
            m = traj == r
            if not m.any():
                raise EstimationError(f"trajectory '{rec.trajectory_names[r]}' has no samples")
            first[r] = t[m].min()
        tau = t - first[traj]
        T = float(np.max(tau)) if tau.size else 0.0
        if not T > 0:
            raise TooFewSamplesError(
                "every trajectory has a single time; the trajectory fit needs samples "
                "spread in time",
                source=rec.source,
            )
        mu = values.mean(axis=0)
        sd = values.std(axis=0)
        sd = np.where(sd > 0, sd, np.maximum(np.abs(mu), 1.0))
        eq_i = None if eq is None else (eq - mu) / sd
        return _Problem(
            tau=tau / T,
            traj=traj,
            y=(values - mu) / sd,
            n_traj=R,
            mu=mu,
            sd=sd,
            T=T,
            eq=eq_i,
        )

    def _starts(
        self, rec: Recording, eq: np.ndarray | None, prob: _Problem, values: np.ndarray
    ) -> tuple[list[tuple[str, np.ndarray]], str, list[str]]:
        """Starting parameter vectors (internal units), the parameterisation, notes."""
        from fitdyn.estimators.derivative import DerivativeEstimator
        from fitdyn.estimators.integral import IntegralEstimator

        rec_v = rec.with_values(values)
        fast: list[tuple[str, Estimate]] = []
        failures = []
        order = {"integral": ["integral"], "derivative": ["derivative"]}.get(
            self.settings["start"], ["integral", "derivative"]
        )
        for name in order:
            try:
                est = (IntegralEstimator() if name == "integral" else DerivativeEstimator()).fit(
                    rec_v, eq
                )
            except FitdynError as exc:
                failures.append(f"{name}: {exc}")
                continue
            if np.all(np.isfinite(est.matrix)) and np.all(np.isfinite(est.offset)):
                fast.append((name, est))
        if not fast:
            # the other fast estimator as a last resort
            other = "derivative" if order == ["integral"] else "integral"
            try:
                est = (IntegralEstimator() if other == "integral" else DerivativeEstimator()).fit(
                    rec_v, eq
                )
                if np.all(np.isfinite(est.matrix)):
                    fast.append((other, est))
            except FitdynError as exc:
                failures.append(f"{other}: {exc}")
        notes = [f"no start from {f}" for f in failures]
        # each start: (label, A, x*, b, x0) in internal units
        cands: list[tuple[str, np.ndarray, np.ndarray | None, np.ndarray, np.ndarray]] = []
        for name, est in fast:
            A_i = prob.to_internal_A(est.matrix)
            xs = est.equilibrium
            xs_i = None if xs is None else (np.asarray(xs, dtype=float) - prob.mu) / prob.sd
            b_i = prob.T * (np.asarray(est.offset) + est.matrix @ prob.mu) / prob.sd
            x0_i = self._initial_states(rec, est, name, values, prob)
            cands.append((name, A_i, xs_i, b_i, x0_i))
        if not cands:
            # no fast estimate (e.g. data along one direction only): a plain decay over
            # the record towards the mean, from the first samples
            x0_i = np.array([prob.y[np.flatnonzero(prob.traj == r)[0]] for r in range(prob.n_traj)])
            xs_i = np.zeros(2) if eq is None else prob.eq
            # b = -A x* with A = -I
            cands.append(("plain decay", -np.eye(2), xs_i, xs_i.copy(), x0_i))
            notes.append("no fast estimate available; started from a plain decay")
        # the parameterisation follows the first start
        _, A0, xs0, _, _ = cands[0]
        rho = float(np.max(np.abs(linalg2.eigvals(A0))))
        det = float(np.linalg.det(A0))
        if eq is not None:
            kind = "known"
        else:
            far = xs0 is None or float(np.max(np.abs(xs0))) > 1e3
            singular = rho == 0 or abs(det) <= _SINGULAR * rho**2
            kind = "offset" if (singular or far) else "equilibrium"
        starts: list[tuple[str, np.ndarray]] = []
        for name, A_i, xs_i, b_i, x0_i in cands:
            if kind == "known":
                v = np.zeros(0)
            elif kind == "equilibrium":
                v = xs_i if xs_i is not None else np.zeros(2)
            else:
                v = b_i
            theta = np.concatenate([A_i.ravel(), v, x0_i.ravel()])
            starts.append((name, theta))
            tau_, _, disc = linalg2.invariants(A_i)
            if disc < 0 and self.settings["frequencies"]:
                s = 0.5 * tau_
                Mf = A_i - s * np.eye(2)
                for f in self.settings["frequencies"]:
                    th = theta.copy()
                    th[:4] = (s * np.eye(2) + f * Mf).ravel()
                    starts.append((f"{name} x{f:g} frequency", th))
        return starts, kind, notes

    @staticmethod
    def _initial_states(
        rec: Recording, est: Estimate, name: str, values: np.ndarray, prob: _Problem
    ) -> np.ndarray:
        """Starting state of each trajectory (internal units)."""
        R = rec.n_trajectories
        x0 = np.zeros((R, 2))
        seg_states = est.extra.get("segment_initial_states") if name == "integral" else None
        bounds = rec.segment_bounds()
        traj = np.asarray(rec.trajectory)
        for r in range(R):
            k = next(i for i, (a, _) in enumerate(bounds) if traj[a] == r)
            a = bounds[k][0]
            x0[r] = seg_states[k] if seg_states is not None else values[a]
        return (x0 - prob.mu) / prob.sd

    # -- solving ---------------------------------------------------------------------------
    def _minimize(self, theta0: np.ndarray, prob: _Problem, kind: str, w: np.ndarray, scale: bool):
        import lmfit

        names = _names(prob.n_traj, kind)
        params = lmfit.Parameters()
        for nm, val in zip(names, theta0, strict=True):
            params.add(nm, value=float(val))

        def fcn(p):
            theta = np.fromiter((p[nm].value for nm in names), float, len(names))
            return _residual(theta, prob, kind, w)

        tol = self.settings["tol"]
        kws: dict[str, Any] = {"ftol": tol, "xtol": tol, "gtol": tol, "x_scale": "jac"}
        # a nearly singular J'J gives lmfit negative variances (NaN standard errors);
        # that is detected and reported from the result, so numpy need not warn
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            res = lmfit.minimize(
                fcn,
                params,
                method="least_squares",
                scale_covar=scale,
                max_nfev=self.settings["max_nfev"],
                **kws,
            )
        theta = np.array([res.params[nm].value for nm in names])
        return res, theta

    def _reweighted(
        self,
        theta: np.ndarray,
        prob: _Problem,
        kind: str,
        w: np.ndarray,
        scale: bool,
        n_par: int,
    ):
        """Fit with weights ``1 / sd`` of each channel's residuals, iterated to a fixed point.

        The fixed point maximises the Gaussian likelihood with unknown per-channel
        noise variances (each variance profiled out), so it does not depend on the
        starting weights.  Returns ``(result, theta, w, nfev, estimated)``;
        ``estimated`` is False for residuals too small to estimate a noise level
        (noise-free data), in which case the given weights are kept.
        """
        n = prob.tau.size
        dof = max(n - n_par / 2.0, 1.0)
        nfev = 0
        res = None
        estimated = False
        for _ in range(_REWEIGHT_ROUNDS):
            resid = prob.y - _model(theta, prob, kind)
            s_hat = np.sqrt(np.sum(resid**2, axis=0) / dof)
            if not (np.all(s_hat > 1e-9) and np.all(np.isfinite(s_hat))):
                break
            w_new = 1.0 / s_hat
            change = float(np.max(np.abs(w_new / w - 1.0)))
            w = w_new
            estimated = True
            if res is not None and change < 1e-7:
                break
            res, theta = self._minimize(theta, prob, kind, w, scale)
            nfev += int(res.nfev)
        if res is None:
            res, theta = self._minimize(theta, prob, kind, w, scale)
            nfev += int(res.nfev)
        return res, theta, w, nfev, estimated

    def _weights0(self, prob: _Problem) -> tuple[np.ndarray, str]:
        """Stage-one weights in internal units and how they were set."""
        if self.settings["noise_sd"] is not None:
            return prob.sd / np.asarray(self.settings["noise_sd"]), "known noise sd"
        if self.settings["weights"] is not None:
            return prob.sd * np.asarray(self.settings["weights"]), "given weights"
        return np.ones(2), "estimated"

    def _search(
        self, starts: list[tuple[str, np.ndarray]], prob: _Problem, kind: str, w: np.ndarray
    ) -> tuple[np.ndarray, str, list[dict[str, Any]], int]:
        """Best start by variable projection over ``A`` alone (4 parameters).

        For fixed ``A`` the model is linear in the starting states and ``x*`` (or
        ``b``), so those are solved by linear least squares inside the residual
        (Golub & Pereyra, *SIAM J. Numer. Anal.* 10, 1973); each start then needs a
        4-parameter search only.  Too large problems skip the search and use the
        first start as it is.
        """
        from scipy.optimize import least_squares

        n_lin = 2 * prob.n_traj + (0 if kind == "known" else 2)
        if 2 * prob.tau.size * n_lin > _PROJECTION_LIMIT:
            return starts[0][1], starts[0][0], [{"start": starts[0][0], "search": "skipped"}], 0
        tried = []
        best = None
        nfev = 0
        tol = max(self.settings["tol"], 1e-12)
        for label, th0 in starts:
            try:
                sol = least_squares(
                    lambda a: _project(a, prob, kind, w)[1],
                    th0[:4],
                    method="trf",
                    x_scale="jac",
                    ftol=tol,
                    xtol=tol,
                    gtol=tol,
                    max_nfev=200,
                )
            except (ValueError, np.linalg.LinAlgError):
                tried.append({"start": label, "cost": float("inf"), "nfev": 0})
                continue
            lin, r = _project(sol.x, prob, kind, w)
            cost = float(r @ r)
            nfev += int(sol.nfev)
            tried.append({"start": label, "cost": cost, "nfev": int(sol.nfev)})
            if best is None or cost < best[0]:
                best = (cost, _full_theta(sol.x, lin, prob, kind), label)
        if best is None:
            return starts[0][1], starts[0][0], tried, nfev
        return best[1], best[2], tried, nfev

    def _solve(self, rec: Recording, values: np.ndarray, eq: np.ndarray | None) -> dict[str, Any]:
        """The whole procedure on one set of values."""
        prob = self._problem(rec, values, eq)
        n_par = 4 + (0 if eq is not None else 2) + 2 * prob.n_traj
        if 2 * rec.n_samples <= n_par:
            raise TooFewSamplesError(
                f"the trajectory fit has {2 * rec.n_samples} values for {n_par} parameters; "
                "record more samples",
                source=rec.source,
            )
        starts, kind, notes = self._starts(rec, eq, prob, values)
        w, how = self._weights0(prob)
        scale = how != "known noise sd"
        theta, label, tried, nfev = self._search(starts, prob, kind, w)
        if how == "estimated":
            res, theta, w, more, ok = self._reweighted(theta, prob, kind, w, scale, n_par)
            nfev += more
            if not ok:
                how = "channel spreads; the residuals are too small to estimate the noise"
        else:
            res, theta = self._minimize(theta, prob, kind, w, scale)
            nfev += int(res.nfev)
        if kind == "equilibrium":
            # a nearly singular result: the equilibrium runs away; refit by offset
            A_i = theta[:4].reshape(2, 2)
            rho = float(np.max(np.abs(linalg2.eigvals(A_i))))
            if rho == 0 or abs(np.linalg.det(A_i)) <= _SINGULAR * rho**2:
                cost = float(np.sum(_residual(theta, prob, kind, w) ** 2))
                xs = theta[4:6]
                th_b = np.concatenate([theta[:4], -A_i @ xs, theta[6:]])
                res_b, th_b = self._minimize(th_b, prob, "offset", w, scale)
                nfev += int(res_b.nfev)
                cost_b = float(np.sum(_residual(th_b, prob, "offset", w) ** 2))
                tried.append({"start": "offset refit", "cost": cost_b, "nfev": int(res_b.nfev)})
                if cost_b <= cost:
                    res, theta, kind = res_b, th_b, "offset"
                    notes.append("nearly singular A: refitted with the offset b as parameter")
        return {
            "prob": prob,
            "kind": kind,
            "res": res,
            "theta": theta,
            "w": w,
            "weights_how": how,
            "scale": scale,
            "start": label,
            "tried": tried,
            "nfev": nfev,
            "notes": notes,
        }

    # -- mapping back ------------------------------------------------------------------------
    @staticmethod
    def _original(theta: np.ndarray, prob: _Problem, kind: str) -> dict[str, np.ndarray]:
        A_i, v, x0 = _split(theta, prob, kind)
        A = prob.to_original_A(A_i)
        x0_o = prob.mu + prob.sd * x0
        if kind == "offset":
            b = prob.sd * v / prob.T - A @ prob.mu
            xs = None
            v_o = b
        else:
            xs = prob.mu + prob.sd * v
            b = -A @ xs
            v_o = xs
        return {"A": A, "b": b, "xs": xs, "v": v_o, "x0": x0_o}

    def _jacobians(
        self, theta: np.ndarray, prob: _Problem, kind: str
    ) -> tuple[np.ndarray, np.ndarray]:
        """d(a, b)/d theta (6, p) and d(original params)/d theta (p, p).

        The maps are linear in each parameter separately (``b = -A x*`` is bilinear),
        so central differences are exact up to rounding.
        """
        p = theta.size

        def six(th):
            o = self._original(th, prob, kind)
            return np.concatenate([o["A"].ravel(), o["b"]])

        def full(th):
            o = self._original(th, prob, kind)
            v = o["v"] if kind != "known" else np.zeros(0)
            return np.concatenate([o["A"].ravel(), v, o["x0"].ravel()])

        J6 = np.zeros((6, p))
        Jf = np.zeros((p, p))
        for k in range(p):
            h = 1e-3 * max(1.0, abs(theta[k]))
            tp = theta.copy()
            tm = theta.copy()
            tp[k] += h
            tm[k] -= h
            J6[:, k] = (six(tp) - six(tm)) / (2 * h)
            Jf[:, k] = (full(tp) - full(tm)) / (2 * h)
        return J6, Jf

    def _covariances(self, sol: dict[str, Any]):
        """(param_cov (6, 6) or None, covariance of the original parameters or None, warnings)."""
        res, theta, prob, kind = sol["res"], sol["theta"], sol["prob"], sol["kind"]
        names = _names(prob.n_traj, kind)
        warns: list[str] = []
        jac = getattr(res, "jac", None)
        unidentified: list[str] = []
        if jac is not None and np.all(np.isfinite(jac)):
            _, s, Vt = np.linalg.svd(np.asarray(jac, dtype=float), full_matrices=False)
            if s.size and s[0] > 0:
                null = s / s[0] < 1e-7
                for vec in Vt[null]:
                    for nm, comp in zip(names, vec, strict=True):
                        if abs(comp) > 0.2 and nm not in unidentified:
                            unidentified.append(nm)
            else:
                unidentified = list(names)
        covar = getattr(res, "covar", None)
        ok = (
            covar is not None
            and bool(getattr(res, "errorbars", False))
            and np.all(np.isfinite(covar))
            and not unidentified
        )
        if unidentified:
            warns.append(
                "the trajectory fit leaves parameter(s) unidentified (near-zero singular "
                f"values of the Jacobian): {', '.join(_pretty(unidentified))}; no asymptotic "
                "covariance is reported, use a bootstrap or more informative data"
            )
        elif not ok:
            warns.append(
                "lmfit reported no covariance for the trajectory fit (singular or "
                "non-finite); use a bootstrap for the uncertainty"
            )
        if not ok:
            return None, None, warns
        J6, Jf = self._jacobians(theta, prob, kind)
        C = np.asarray(covar, dtype=float)
        cov6 = J6 @ C @ J6.T
        covf = Jf @ C @ Jf.T
        return 0.5 * (cov6 + cov6.T), 0.5 * (covf + covf.T), warns

    def _report(self, sol: dict[str, Any], covf: np.ndarray | None) -> str:
        """lmfit's report of the parameters in the recording's units."""
        import lmfit

        res, theta, prob, kind = sol["res"], sol["theta"], sol["prob"], sol["kind"]
        o = self._original(theta, prob, kind)
        names = _names(prob.n_traj, kind)
        vals = np.concatenate(
            [o["A"].ravel(), o["v"] if kind != "known" else np.zeros(0), o["x0"].ravel()]
        )
        params = lmfit.Parameters()
        for nm, val in zip(names, vals, strict=True):
            params.add(nm, value=float(val))
        if covf is not None:
            sd = np.sqrt(np.clip(np.diag(covf), 0.0, None))
            for i, nm in enumerate(names):
                par = params[nm]
                par.stderr = float(sd[i])
                par.correl = {
                    names[j]: float(covf[i, j] / (sd[i] * sd[j]))
                    for j in range(len(names))
                    if j != i and sd[i] > 0 and sd[j] > 0
                }
        head = [
            "[[Fit Statistics]] (weighted residuals in internal scaled units)",
            f"    # fitting method   = {res.method}",
            f"    # function evals   = {sol['nfev']}",
            f"    # data points      = {res.ndata}",
            f"    # variables        = {res.nvarys}",
            f"    chi-square         = {res.chisqr:.6g}",
            f"    reduced chi-square = {res.redchi:.6g}",
            f"    success            = {bool(res.success)} ({res.message})",
            "[[Parameters]] (recording units; a = system matrix, "
            + ("xs = equilibrium" if kind == "equilibrium" else "b = offset")
            + ", x0_r_j = starting state of trajectory r, channel j)",
        ]
        return "\n".join(head) + "\n" + lmfit.fit_report(params, show_correl=True)

    # -- protocol -----------------------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Output-error point estimate (see the module notes)."""
        eq = check_equilibrium(equilibrium)
        values = np.asarray(rec.values, dtype=float)
        sol = self._solve(rec, values, eq)
        prob, kind, theta, res = sol["prob"], sol["kind"], sol["theta"], sol["res"]
        o = self._original(theta, prob, kind)
        model = prob.mu + prob.sd * _model(theta, prob, kind)
        resid = values - model
        n_par = theta.size
        dof = max(rec.n_samples - n_par / 2.0, 1.0)
        rcov = resid.T @ resid / dof
        cov6, covf, cov_warns = self._covariances(sol)
        A, b = o["A"], o["b"]
        if eq is not None:
            eq_out: np.ndarray | None = eq
        elif kind == "equilibrium":
            eq_out = o["xs"]
        else:
            from fitdyn.estimators.base import equilibrium_from

            xs = equilibrium_from(A, b)
            eq_out = None if np.any(np.isnan(xs)) else xs
        w_orig = sol["w"] / prob.sd
        notes = [
            "output-error fit of x(t) = x* + expm(A (t - t0)) (x0 - x*) by lmfit "
            f"least_squares, {rec.n_trajectories} trajectory start state(s) fitted",
            f"parameterised by {'the offset b' if kind == 'offset' else 'the equilibrium'}"
            if eq is None
            else "equilibrium given, not fitted",
            f"channel weights {w_orig[0]:.4g}, {w_orig[1]:.4g} ({sol['weights_how']})",
            f"best of {len(sol['tried'])} start(s): {sol['start']}",
            *sol["notes"],
        ]
        if sol["scale"]:
            notes.append("covariance scaled by the reduced chi-square (noise sd estimated)")
        else:
            notes.append("covariance not scaled (noise sd given)")
        warns = list(cov_warns)
        if not res.success:
            warns.append(f"the trajectory fit did not report convergence: {res.message}")
        rho1 = residual_lag1(resid, np.asarray(rec.segment))
        # rounding-level residuals (noise-free data) have no meaningful correlation
        visible = bool(np.all(np.sqrt(np.diag(rcov)) > 1e-8 * prob.sd))
        if visible and np.isfinite(rho1) and rho1 > 0.5:
            warns.append(
                f"residuals are strongly autocorrelated (lag-1 {rho1:.2f}): process noise or "
                "a model misfit; the output-error covariance then understates the "
                "uncertainty (consider method 'discrete' or 'integral' with a block bootstrap)"
            )
        self._reference = {
            "times": np.asarray(rec.times, dtype=float).copy(),
            "trajectory": np.asarray(rec.trajectory).copy(),
            "eq": None if eq is None else eq.copy(),
            "kind": kind,
            "theta": theta.copy(),
            "w": sol["w"].copy(),
            "scale": sol["scale"],
            "how": sol["weights_how"],
            "mu": prob.mu.copy(),
            "sd": prob.sd.copy(),
            "T": prob.T,
        }
        extra = {
            "initial_states": o["x0"],
            "lmfit_report": self._report(sol, covf),
            "nfev": int(sol["nfev"]),
            "starts": sol["tried"],
            "parameterisation": "offset" if kind == "offset" else "equilibrium",
            "weights": w_orig,
            "residual_lag1": rho1,
            "success": bool(res.success),
        }
        settings = dict(self.settings)
        settings["frequencies"] = list(settings["frequencies"])
        return Estimate(
            method=self.name,
            matrix=A,
            offset=b,
            equilibrium=eq_out,
            equilibrium_known=eq is not None,
            residuals=resid,
            residual_cov=rcov,
            n_used=rec.n_samples,
            settings=settings,
            param_cov=cov6,
            notes=tuple(notes),
            warnings=tuple(warns),
            extra=extra,
        )

    def fit_values(
        self, rec: Recording, values: np.ndarray, equilibrium: np.ndarray | None = None
    ) -> SystemBatch:
        """Refit replicate values (B, n, 2); loops over replicates.

        When :meth:`fit` ran on a recording with the same sampling and equilibrium
        setting, each replicate starts from that point estimate with its weights
        (one start, no multi-start: replicates stay near the point estimate);
        otherwise each replicate gets the full procedure.  Replicates whose fit
        fails are returned with ``valid = False``.
        """
        eq = check_equilibrium(equilibrium)
        V, _ = replicate_values(rec, values)
        B = V.shape[0]
        mats = np.full((B, 2, 2), np.nan)
        offs = np.full((B, 2), np.nan)
        valid = np.zeros(B, dtype=bool)
        ref = self._reference
        use_ref = (
            ref is not None
            and ref["times"].shape == rec.times.shape
            and np.array_equal(ref["times"], rec.times)
            and np.array_equal(ref["trajectory"], rec.trajectory)
            and ((ref["eq"] is None) == (eq is None))
            and (eq is None or np.array_equal(ref["eq"], eq))
        )
        for r in range(B):
            try:
                if use_ref:
                    assert ref is not None
                    # the point estimate's internal units (same times, so same time
                    # scale), so that its parameters and weights are the start
                    prob = replace(
                        self._problem(rec, V[r], eq),
                        mu=ref["mu"],
                        sd=ref["sd"],
                        y=(V[r] - ref["mu"]) / ref["sd"],
                        eq=None if eq is None else (eq - ref["mu"]) / ref["sd"],
                    )
                    n_par = ref["theta"].size
                    if ref["how"] == "estimated":
                        _, theta, *_ = self._reweighted(
                            ref["theta"], prob, ref["kind"], ref["w"], ref["scale"], n_par
                        )
                    else:
                        _, theta = self._minimize(
                            ref["theta"], prob, ref["kind"], ref["w"], ref["scale"]
                        )
                    o = self._original(theta, prob, ref["kind"])
                else:
                    sol = self._solve(rec, V[r], eq)
                    o = self._original(sol["theta"], sol["prob"], sol["kind"])
            except FitdynError:
                continue
            A, b = o["A"], o["b"]
            if np.all(np.isfinite(A)) and np.all(np.isfinite(b)):
                mats[r], offs[r], valid[r] = A, b, True
        return SystemBatch(matrix=mats, offset=offs, valid=valid)


def _pretty(names: list[str]) -> list[str]:
    out = []
    for nm in names:
        if nm.startswith("x0_"):
            _, r, j = nm.split("_")
            out.append(f"starting state of trajectory {r}, channel {j}")
        elif nm.startswith("xs"):
            out.append(f"equilibrium channel {nm[2:]}")
        else:
            out.append(nm)
    return out
