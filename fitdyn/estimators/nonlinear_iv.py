"""One-step fit by nonlinear instrumental variables: both noises, any steps.

Under ``dx = A (x - x*) dt + Q^{1/2} dW`` sampled with sensor noise, ``y_k = x_k +
v_k``, consecutive samples ``h_k`` apart within a gap-free segment obey

    y_{k+1} - x* = F_k (y_k - x*) + r_k,      F_k = expm(A h_k),
    r_k = w_k + v_{k+1} - F_k v_k,

whatever the steps.  The error ``r_k`` is correlated with the regressor ``y_k``
through ``v_k``, so the prediction-error (least-squares) fit is pulled toward zero
by the sensor noise; the sample before, ``y_{k-1}``, is correlated with ``y_k``
through the dynamics but independent of ``r_k`` when the sensor noise is white.
The estimate solves the moment equations

    (1/m) sum_k z_k (x) r_k(A, x*) = 0,        z_k = (y_{k-1} - mean, 1),

six equations in the six unknowns ``(A, x*)`` (with a known equilibrium the
constant instrument and ``x*`` are dropped: four in four).  This is the nonlinear
instrumental-variable estimator (Amemiya, J. Econometrics 2, 1974; Hansen,
Econometrica 50, 1982, for the general method of moments; both from memory),
consistent under process noise, sensor noise or both, on uniform or irregular
steps.  On a uniform step it is the ``instrumental`` estimator with one lag: the
moment equations are the same
two-stage least-squares equations in ``F = expm(A h)`` and ``g = (I - F) x*``, a
one-to-one reparameterisation (where ``F`` has a real logarithm).

The solve
---------
The equations are solved by minimising ``|| m(theta) ||^2`` with the batched
Levenberg-Marquardt core shared with the prediction-error and output-error fits
(:mod:`fitdyn.estimators.lm`), on the one-step errors of the prediction-error fit
(:mod:`fitdyn.estimators.prediction`: internal units, closed-form ``expm`` and its
Frechet derivative), so every
replicate of the bootstrap is solved in the same batched call as the point
estimate.  The moments are affine in ``x*``, which is eliminated by a 2x2
least-squares solve inside each evaluation (variable projection, as in the
prediction-error fit): on the coverage benchmark's irregular-mixed datasets up to
3 % of the refits used to crawl along the flat valley of a nearly singular ``A`` to
the iteration cap and fail; now none do, in 4-5 iterations each (refits start at
the point estimate with almost no damping).  At a solution the objective is zero
to rounding.  In small samples the
equations may have no exact solution (as the uniform-step fit may have no real
logarithm); the minimiser of ``|| m ||^2`` is then the estimate (the method of
moments with identity weighting) and the notes say so.  Several starts are tried
for the point fit (the prediction-error fit's starts); among the solutions the one
with the smallest one-step prediction error is kept.  Bootstrap replicates start
from the point estimate.

Uncertainty
-----------
The default bootstrap regenerates records from the fitted model with its process
and sensor noise, bias corrected.  The noise is estimated by maximum likelihood with
the drift held at the estimate (:func:`fitdyn.noise.fit_noise`, a Kalman filter on
the actual steps, started from moments of the one-step errors,
:func:`fitdyn.bootstrap.noise_model`): where the sensor noise dominates the step
innovation the moment estimate of the process noise is erratic, and in the coverage
benchmark's "irregular-mixed" scenario the intervals then covered the determinant
about 0.91 of the time instead of 0.95 (with the true noise: 0.95).  The asymptotic covariance
is the method-of-moments sandwich ``G^{-1} S G^{-T}``, ``G`` the Jacobian of the
moments and ``S`` their covariance with the lag-one autocovariance included (the
moment contributions of neighbouring pairs share a sensor error).

Assumptions: white sensor noise (coloured sensor noise makes ``y_{k-1}`` an invalid
instrument) and instruments that are not weak: over very long steps ``y_{k-1}``
carries little information on ``y_k``, and the fit warns when the smallest
canonical correlation between instruments and regressors is low.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from fitdyn import linalg2
from fitdyn.errors import EstimationError, FitdynError, SamplingError, TooFewSamplesError
from fitdyn.estimators.base import Estimate, equilibrium_from
from fitdyn.estimators.derivative import check_equilibrium, reject_unknown
from fitdyn.estimators.instrumental import WEAK_INSTRUMENTS, _canonical_min
from fitdyn.estimators.lm import TimeBudget
from fitdyn.estimators.prediction import (
    _CHUNK_BYTES,
    ALIASING_LIMIT,
    PredictionEstimator,
    _evaluate,
    _evaluate_projected,
    _Problem,
    solve_one_step,
)
from fitdyn.noise import NoiseFit, fit_noise
from fitdyn.recording import Recording

__all__ = ["NonlinearIVEstimator", "instrumented_pairs", "ROOT_TOLERANCE"]

#: objective, relative to the squared size of the moment contributions, below which
#: the moment equations count as solved exactly
ROOT_TOLERANCE = 1e-12
#: the moments count as zero (the solve stops) at an objective of 1e-28 of this times
#: the squared size of their terms, i.e. at 1e-12 of the terms' size: the rounding
#: level of a sum of a few hundred terms, amplified where x* lies far from the data
_ROUNDING_SCALE = 1e4
#: starting damping of the bootstrap refits, which start at the point estimate next to
#: their solution: Gauss-Newton (Newton's method on the moment equations) from the
#: first step; with 1e-8 the refits of an ill-conditioned 500-sample record took
#: twice the iterations, the damping shrinking by only a factor 3 per step; on 39 of
#: the coverage benchmark's irregular-mixed datasets x 250 replicates every refit
#: equals the one with damping 1e-3 to 1e-6 relative (no Newton step reached another
#: root)
_REFIT_DAMPING = 1e-14
#: bytes per (replicate x start x pair) inside the solver
_BYTES_PER_PAIR = 8 * 160
_NEED = 6


def instrumented_pairs(rec: Recording, method: str) -> tuple[np.ndarray, np.ndarray]:
    """Pairs ``(k, k + 1)`` whose sample ``k - 1`` lies in the same gap-free segment.

    Parameters
    ----------
    rec : Recording
    method : str
        Name used in the error messages.

    Returns
    -------
    first : int ndarray, shape (m,)
        ``k`` of each pair (``k - 1`` is its instrument, ``k + 1`` its target).
    h : ndarray, shape (m,)
        The steps ``t_{k+1} - t_k``.

    Raises
    ------
    TooFewSamplesError
        Fewer than six such runs of three samples.
    SamplingError
        A step that is not positive.
    """
    seg = np.asarray(rec.segment)
    k = np.arange(1, seg.size - 1)
    first = k[(seg[k - 1] == seg[k]) & (seg[k + 1] == seg[k])]
    if first.size < _NEED:
        raise TooFewSamplesError(
            f"the {method} fit needs at least {_NEED} runs of three consecutive samples "
            f"within a gap-free segment, found {first.size}; record more samples",
            source=rec.source,
        )
    t = np.asarray(rec.times, dtype=float)
    steps = np.diff(t)
    bad = np.flatnonzero(~(steps[first] > 0) | ~(steps[first - 1] > 0))
    if bad.size:
        j = int(first[bad[0]])
        j = j - 1 if not steps[j - 1] > 0 else j
        raise SamplingError(
            f"the step after time {float(t[j]):.6g} is {float(steps[j]):.6g}, not positive; "
            "merge repeated times or sort the time column",
            source=rec.source,
            row=int(rec.source_rows[j + 1]),
        )
    return first, steps[first]


@dataclass
class _Moments:
    """A chunk of moment problems: the one-step problem plus instruments."""

    inner: _Problem
    Z: np.ndarray  # (B, m, q) instruments, internal units, already divided by m

    @property
    def eq(self) -> np.ndarray | None:
        return self.inner.eq

    @property
    def n_par(self) -> int:
        return self.inner.n_par

    def take(self, idx: np.ndarray) -> _Moments:
        return _Moments(inner=self.inner.take(idx), Z=self.Z[idx])


def _moments(
    theta: np.ndarray, prob: _Moments, jacobian: bool
) -> tuple[np.ndarray, np.ndarray | None]:
    """Moments (B, q, 2) and their Jacobian (B, q, 2, P)."""
    r, Jr = _evaluate(theta, prob.inner, jacobian)
    Zt = np.swapaxes(prob.Z, 1, 2)
    M = Zt @ r
    if not jacobian:
        return M, None
    assert Jr is not None
    B, m, _, P = Jr.shape
    return M, (Zt @ Jr.reshape(B, m, 2 * P)).reshape(B, -1, 2, P)


def _moments_projected(
    a: np.ndarray, prob: _Moments, jacobian: bool
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """Moments with the equilibrium eliminated (``prediction._evaluate_projected``)."""
    return _evaluate_projected(a, prob.inner, jacobian, Z=prob.Z)


def _contribution_scale(
    theta: np.ndarray, prob: _Moments, r: np.ndarray | None = None
) -> np.ndarray:
    """Squared size (B,) of the moments' terms: rounding-level zero is 1e-16 of it.

    ``r``: the one-step errors at ``theta``, when already known.
    """
    if r is None:
        r, _ = _evaluate(theta, prob.inner, False)
    a = np.swapaxes(np.abs(prob.Z), 1, 2) @ np.abs(r)
    s = np.sum(a * a, axis=(1, 2))
    return np.where(np.isfinite(s) & (s > 0), s, 1.0)


class NonlinearIVEstimator(PredictionEstimator):
    """One-step fit by nonlinear instrumental variables, for process plus sensor noise.

    Parameters
    ----------
    noise : {"likelihood", "moments"}
        How the process and sensor noise of the fitted model (which the parametric
        bootstrap simulates with) are estimated: ``"likelihood"`` (default) by
        maximum likelihood with the drift held at the estimate
        (:func:`fitdyn.noise.fit_noise`; about a second for a few hundred samples),
        ``"moments"`` by moments of the one-step errors
        (:func:`fitdyn.bootstrap.noise_model`; instant, but its process noise is
        erratic when the sensor noise dominates, and the bootstrap intervals then
        cover less often).
    frequencies : sequence of float
        Factors applied to an oscillatory start's frequency for extra starts of the
        point fit (default ``(0.5, 2.0)``; empty for none).
    max_iterations : int
        Levenberg-Marquardt iteration cap (default 100).
    xtol : float
        Relative step size at which an iteration counts as converged (default 1e-10).
    time_budget : float or None
        Wall-clock seconds for the point fit's solve and, shared, for all the
        bootstrap refits of that point fit (default 30; ``None`` for no limit), as in
        :class:`~fitdyn.estimators.prediction.PredictionEstimator`.

    Notes
    -----
    ``extra`` holds ``process_noise`` and ``measurement_cov`` (by moments of the
    one-step errors; the parametric bootstrap simulates with them),
    ``step_range``, ``iterations``, ``objective`` (``|| m ||^2`` in internal units),
    ``solved`` (whether the moment equations were solved exactly), ``converged``,
    ``instrument_strength`` and ``starts``.  ``param_cov`` is the
    method-of-moments sandwich covariance of ``(a11, a12, a21, a22, b1, b2)``.
    """

    name: ClassVar[str] = "nonlinear-iv"
    needs_uniform_steps: ClassVar[bool] = False

    def __init__(
        self,
        noise: str = "likelihood",
        frequencies: Any = (0.5, 2.0),
        max_iterations: int = 100,
        xtol: float = 1e-10,
        time_budget: float | None = 30.0,
        **unknown: Any,
    ) -> None:
        reject_unknown(
            self.name,
            unknown,
            ("noise", "frequencies", "max_iterations", "xtol", "time_budget"),
        )
        if noise not in ("likelihood", "moments"):
            raise EstimationError(f"noise must be 'likelihood' or 'moments', got {noise!r}")
        super().__init__(
            frequencies=frequencies,
            max_iterations=max_iterations,
            xtol=xtol,
            time_budget=time_budget,
        )
        del self.settings["weighting"]
        self.settings["noise"] = noise

    def _pairs(self, rec: Recording) -> tuple[np.ndarray, np.ndarray]:
        return instrumented_pairs(rec, self.name)

    def _chunk(self, m: int, starts: int) -> int:
        return int(max(1, _CHUNK_BYTES // max(m * starts * _BYTES_PER_PAIR, 1)))

    # -- the batched solve ------------------------------------------------------------
    def _solve_chunk(
        self,
        V: np.ndarray,
        eq: np.ndarray | None,
        first: np.ndarray,
        h: np.ndarray,
        starts: list[tuple[str, np.ndarray, np.ndarray]],
    ) -> dict[str, Any]:
        """Solve the moment equations for replicates ``V`` (B, n, 2) from every start."""
        B = V.shape[0]
        S = len(starts)
        m = first.size
        mu, sd, T = self._units(V, h)
        tau = h / T
        U = (V - mu[:, None, :]) / sd[:, None, :]
        eq_i = None if eq is None else (eq[None, :] - mu) / sd
        rep = np.tile(np.arange(B), S)
        inner = _Problem(
            u0=U[rep][:, first],
            u1=U[rep][:, first + 1],
            tau=tau,
            root=np.ones(m),
            eq=None if eq_i is None else eq_i[rep],
            Linv=np.broadcast_to(np.eye(2), (B * S, 2, 2)).copy(),
        )
        zl = U[:, first - 1]  # (B, m, 2)
        if eq_i is None:
            zl = zl - zl.mean(axis=1, keepdims=True)
            Z = np.concatenate([zl, np.ones((B, m, 1))], axis=2)
        else:
            Z = zl - eq_i[:, None, :]
        thetas = []
        for _, A, xs in starts:
            A_i, xs_i = self._to_internal(A, xs, mu, sd, T)
            th = A_i.reshape(B, 4)
            if eq is None:
                th = np.concatenate([th, xs_i], axis=1)
            thetas.append(th)
        theta0 = np.concatenate(thetas, axis=0)
        prob = _Moments(inner=inner, Z=(Z / m)[rep])
        # refits start at the point estimate, next to their solution: nearly
        # Gauss-Newton steps from the first iteration
        refit = S == 1 and starts[0][0] == "point estimate"
        one = self._solve_moments(theta0, prob, S, B, _REFIT_DAMPING if refit else 1e-3)
        best = one["best"]
        cost_by_start = one["cost_by_start"]
        iterations = one["iterations"]
        theta = one["theta"]
        A_i, xs_i = self._unpack_iv(theta, eq_i)
        A, xs = self._to_original(A_i, xs_i, mu, sd, T)
        return {
            "A": A,
            "xs": xs,
            "theta": theta,
            "cost": one["cost"],
            "converged": one["converged"],
            "solved": one["solved"],
            "iterations": iterations,
            "best": best,
            "cost_by_start": cost_by_start,
            "prob": one["prob"],
            "units": (mu, sd, T),
        }

    def _solve_moments(
        self, theta0: np.ndarray, prob: _Moments, S: int, B: int, damping: float = 1e-3
    ) -> dict[str, Any]:
        """Levenberg-Marquardt from ``S`` starts per replicate; the best start wins.

        Ranking: converged fits first, exact solutions before minima, then the
        smallest one-step prediction error (solutions) or moment objective (minima).
        """
        sol = solve_one_step(
            theta0,
            prob,
            _moments,
            _ROUNDING_SCALE * _contribution_scale(theta0, prob),
            self.settings["max_iterations"],
            self.settings["xtol"],
            1e-20,
            self._budget.left(),
            _moments_projected,
            damping,
            ROOT_TOLERANCE / _ROUNDING_SCALE,
        )
        r, _ = _evaluate(sol.theta, prob.inner, False)
        solved = sol.cost <= ROOT_TOLERANCE * _contribution_scale(sol.theta, prob, r)
        # no step lowers a cost already at the rounding level of the moments: the
        # equations are solved (to ROOT_TOLERANCE), the row has converged
        at_root = solved & (sol.status == 3)
        sol.converged = sol.converged | at_root
        sol.status = np.where(at_root, 0, sol.status)
        pe = np.sum(r * r, axis=(1, 2))
        pe = np.where(np.isfinite(pe), pe, np.inf)
        ok = sol.converged & np.isfinite(sol.cost)
        key = np.where(ok & solved, pe, np.inf).reshape(S, B)
        key_min = np.where(ok & ~solved, sol.cost, np.inf).reshape(S, B)
        any_solved = np.isfinite(key).any(axis=0)
        best = np.where(any_solved, np.argmin(key, axis=0), np.argmin(key_min, axis=0))
        pick = best * B + np.arange(B)
        return {
            "theta": sol.theta[pick],
            "cost": sol.cost[pick],
            "converged": sol.converged[pick],
            "solved": solved[pick],
            "iterations": sol.iterations.reshape(S, B).sum(axis=0),
            "best": best,
            "cost_by_start": np.where(ok, sol.cost, np.inf).reshape(S, B),
            "prob": prob.take(pick),
        }

    @staticmethod
    def _unpack_iv(theta: np.ndarray, eq_i: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        A = theta[:, :4].reshape(-1, 2, 2)
        xs = eq_i if eq_i is not None else theta[:, 4:6]
        return A, xs

    # -- the point estimate -------------------------------------------------------------
    def fit(self, rec: Recording, equilibrium: np.ndarray | None = None) -> Estimate:
        """Nonlinear instrumental-variable point estimate (see the module notes).

        Raises
        ------
        TooFewSamplesError
            Fewer than six runs of three consecutive samples within segments.
        EstimationError
            When no start leads to a finite fit.
        """
        from fitdyn.bootstrap import noise_model

        eq = check_equilibrium(equilibrium)
        first, h = self._pairs(rec)
        V = np.asarray(rec.values, dtype=float)[None]
        starts = self._starts(rec, V, eq, first, h)
        self._budget = TimeBudget(self.settings["time_budget"])
        sol = self._solve_chunk(V, eq, first, h, starts)
        A = sol["A"][0]
        xs = sol["xs"][0]
        if not (np.all(np.isfinite(A)) and np.all(np.isfinite(xs)) and np.isfinite(sol["cost"][0])):
            raise EstimationError(
                "the instrumental-variable fit found no finite solution from any start; the "
                "data may not follow dx/dt = A (x - x*); try the 'derivative' estimator",
                source=rec.source,
            )
        b = -A @ xs
        m = first.size
        n_par = 6 if eq is None else 4
        F = linalg2.expm(A, h)
        r = V[0, first + 1] - xs - np.einsum("kij,kj->ki", F, V[0, first] - xs)
        dof = max(m - n_par / 2.0, 1.0)
        rcov = r.T @ r / dof
        solved = bool(sol["solved"][0])
        conv = bool(sol["converged"][0])
        iters = int(sol["iterations"][0])
        labels = [lab for lab, _, _ in starts]
        strength = _canonical_min(V[0, first], V[0, first - 1])
        notes: list[str] = [
            f"one-step fit by nonlinear instrumental variables over {m} pairs of consecutive "
            f"samples (each with the sample before as instrument), steps {h.min():.4g} to "
            f"{h.max():.4g}; instrument strength (smallest canonical correlation) "
            f"{strength:.3g}",
            f"Levenberg-Marquardt on the moment equations, {iters} iteration(s) over "
            f"{len(starts)} start(s); best start: {labels[int(sol['best'][0])]}; "
            + (
                "equations solved exactly"
                if solved
                else f"no exact solution, smallest moment objective {float(sol['cost'][0]):.3g}"
            ),
        ]
        warns: list[str] = []
        if eq is not None:
            notes.append("equilibrium given, not fitted")
        if not conv:
            warns.append(
                f"the instrumental-variable fit did not converge within "
                f"{self.settings['max_iterations']} iterations or the time budget; the "
                "estimate may be inaccurate (raise max_iterations or time_budget, or "
                "check the data)"
            )
        if not solved:
            warns.append(
                "the instrumental moment equations have no exact solution for this record; "
                "the estimate minimises their size instead and is less reliable (record "
                "longer, or check that the dynamics are linear)"
            )
        if strength < WEAK_INSTRUMENTS:
            warns.append(
                f"weak instruments: the earlier samples explain little of the current one "
                f"(smallest canonical correlation {strength:.2g} < {WEAK_INSTRUMENTS}); the "
                "estimate is erratic -- sample more finely, or use another estimator"
            )
        lam = linalg2.eigvals(A)
        wmax = float(np.max(np.abs(lam.imag)))
        over = int(np.sum(wmax * h > ALIASING_LIMIT))
        if over:
            warns.append(
                f"aliasing risk: {over} of {m} steps have |Im lambda| * h above pi/2 (longest "
                f"{wmax * h.max():.3g}); only the shorter steps pin the frequency down; "
                "sample more finely"
            )
        try:
            Q, R, noise_note = noise_model(rec, A, b)
        except (FitdynError, np.linalg.LinAlgError) as exc:
            from fitdyn.bootstrap import _psd

            Q, R = _psd(rcov / float(np.mean(h))), np.zeros((2, 2))
            noise_note = f"noise by moments failed ({exc}); process noise from the errors"
        if self.settings["noise"] == "likelihood":
            noise = fit_noise(rec, A, xs, (Q, R))
        else:
            noise = NoiseFit(Q, R, float("nan"), "moments", "as asked")
        if noise.method == "likelihood":
            Q, R = noise.process_noise, noise.measurement_cov
            notes.append(noise.note)
        else:
            notes.append(f"{noise_note} ({noise.note})")
        cov6, cov_warn = self._iv_covariance(sol, first)
        if cov_warn:
            warns.append(cov_warn)
        if eq is not None:
            eq_out: np.ndarray | None = eq
        else:
            e_ = equilibrium_from(A[None], b[None])[0]
            eq_out = None if np.any(np.isnan(e_)) else xs
        self._reference = {
            "times": np.asarray(rec.times, dtype=float).copy(),
            "segment": np.asarray(rec.segment).copy(),
            "eq": None if eq is None else eq.copy(),
            "A": A.copy(),
            "xs": xs.copy(),
            "budget": None,  # one budget for all refits of this point fit
        }
        extra = {
            "process_noise": Q,
            "measurement_cov": R,
            "step_range": (float(h.min()), float(h.max())),
            "iterations": iters,
            "objective": float(sol["cost"][0]),
            "solved": solved,
            "converged": conv,
            "instrument_strength": strength,
            "starts": [
                {"start": lab, "objective": float(c)}
                for lab, c in zip(labels, sol["cost_by_start"][:, 0], strict=True)
            ],
        }
        settings = dict(self.settings)
        settings["frequencies"] = list(settings["frequencies"])
        return Estimate(
            method=self.name,
            matrix=A,
            offset=b,
            equilibrium=eq_out,
            equilibrium_known=eq is not None,
            residuals=r,
            residual_cov=rcov,
            n_used=m,
            settings=settings,
            param_cov=cov6,
            notes=tuple(notes),
            warnings=tuple(warns),
            extra=extra,
        )

    def _iv_covariance(
        self, sol: dict[str, Any], first: np.ndarray
    ) -> tuple[np.ndarray | None, str]:
        """Method-of-moments sandwich covariance of (a11, a12, a21, a22, b1, b2)."""
        prob: _Moments = sol["prob"]
        one = prob.take(np.array([0]))
        theta = sol["theta"][:1]
        _, G = _moments(theta, one, True)
        r, _ = _evaluate(theta, one.inner, False)
        assert G is not None
        P = theta.shape[1]
        Gm = G[0].reshape(-1, P)  # (q * 2, P)
        if not np.all(np.isfinite(Gm)):
            return None, "no asymptotic covariance (non-finite Jacobian); use the bootstrap"
        sv = np.linalg.svd(Gm, compute_uv=False)
        if sv[0] <= 0 or sv[-1] / sv[0] < 1e-8:
            return None, (
                "the instrumental-variable fit leaves a combination of parameters "
                "unidentified (near-singular moment Jacobian); no asymptotic covariance, "
                "use the bootstrap or more varied data"
            )
        # contributions c_k = z_k (x) r_k (already divided by m); neighbours share a
        # sensor error, so the lag-one autocovariance enters (truncated kernel)
        c = np.einsum("mq,mc->mqc", one.Z[0], r[0]).reshape(r.shape[1], -1)
        c = c - c.mean(axis=0)
        Sm = c.T @ c
        nb = first[1:] == first[:-1] + 1  # neighbouring pairs within a segment
        L1 = c[1:][nb].T @ c[:-1][nb]
        Sm = Sm + L1 + L1.T
        w, Vv = np.linalg.eigh(0.5 * (Sm + Sm.T))
        Sm = (Vv * np.clip(w, 0.0, None)) @ Vv.T
        Ginv = np.linalg.pinv(Gm)
        C = Ginv @ Sm @ Ginv.T
        return self._six_covariance(C, sol), ""
