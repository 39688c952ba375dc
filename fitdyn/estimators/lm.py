"""Batched Levenberg-Marquardt: the one nonlinear least-squares core of the iterative fits.

The output-error (``trajectory``), one-step prediction-error (``prediction``) and
nonlinear instrumental (``nonlinear-iv``) fits all minimise a sum of squares
``||e(theta)||^2`` of a residual vector whose Jacobian they know in closed form
(built from the closed-form 2x2 exponential and its Frechet derivative).  This
module solves many such problems at once: a leading batch axis holds every
bootstrap replicate and every start, each with its own damping, convergence flag
and iteration count, so a point fit is the one-row case of the code that refits
the bootstrap replicates.

The method is Levenberg-Marquardt with Marquardt's diagonal scaling (Marquardt,
*J. SIAM* 11, 1963; Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006,
ch. 10): the damping adds ``lam * diag(J'J)`` to ``J'J``; a step that lowers the
cost is taken and ``lam`` shrinks, otherwise ``lam`` grows.  A row has converged when

* its cost is at rounding level (noise-free data), or
* an accepted step is below ``xtol`` relative to the parameters, or
* the undamped Gauss-Newton step predicts a relative decrease of the cost below
  ``ftol`` (a relative precision of the cost; with ``ftol = 1e-10`` and ``N``
  residuals the parameters are within about ``sqrt(N * 1e-10)`` standard errors of
  the minimum), or, below ``1e-12`` (where rounding can no longer judge a step by the
  cost, so Gauss-Newton steps are taken untested), the prediction stops shrinking
  tenfold per step.

A row whose damping runs away while the predicted decrease is below ``stall_tol``
has reached the rounding level of its cost and counts as converged, and so does a
row whose step is rejected while its cost is below ``settle`` times its scale (a
system of equations solved to its rounding level).  The starting damping
(``damping``) can be made small for starts next to their solution, such as
bootstrap refits started at the point estimate.  A row *fails*
when its damping runs away (no step lowers the cost), when its cost
or Jacobian stops being finite, at the iteration cap, or when the time budget runs
out; it is then reported as not converged (``converged = False``), with the reason
in ``status``.  The callers count such rows as failed replicates and never redraw
them, so a hard problem costs a bounded effort instead of a stall.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = [
    "Normal",
    "Solution",
    "TimeBudget",
    "levenberg_marquardt",
    "solve_spd",
    "sum_of_squares",
    "STATUS",
]

#: predicted relative decrease below which Gauss-Newton steps are taken untested
_ROUNDING_ZONE = 1e-12
#: damping above which a row has failed (no step lowers the cost)
_LAM_MAX = 1e16

#: meaning of :attr:`Solution.status`
STATUS: dict[int, str] = {
    0: "converged",
    1: "iteration cap reached",
    2: "time budget spent",
    3: "no step lowers the cost (damping ran away)",
    4: "cost or Jacobian not finite",
}


@dataclass
class Solution:
    """Result of :func:`levenberg_marquardt` for a batch of ``B`` problems.

    Attributes
    ----------
    theta : ndarray, shape (B, P)
        Final parameters (the last accepted ones).
    cost : ndarray, shape (B,)
        Final sum of squares (``inf`` where not finite).
    converged : bool ndarray, shape (B,)
    iterations : int ndarray, shape (B,)
    status : int ndarray, shape (B,)
        Key of :data:`STATUS` (0 for the converged rows).
    residuals : ndarray, shape (B, m)
        Final residuals, flattened.
    aux : ndarray, shape (B, ...), or None
        What ``evaluate`` returned as its third value at the final parameters.
    """

    theta: np.ndarray
    cost: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    status: np.ndarray
    residuals: np.ndarray
    aux: np.ndarray | None = None

    @property
    def n_failed(self) -> int:
        """Number of rows that did not converge."""
        return int(np.sum(~self.converged))

    def failures(self) -> dict[str, int]:
        """Count of the non-converged rows by reason."""
        out: dict[str, int] = {}
        for key, text in STATUS.items():
            k = int(np.sum(self.status == key))
            if key and k:
                out[text] = k
        return out


@dataclass
class Normal:
    """What an ``evaluate`` may return instead of the Jacobian ``J``: the products
    ``J'J`` (B, P, P) and ``J'e`` (B, P), when it can form them more cheaply than
    ``J`` itself (variable projection: ``J'J`` of the projected Jacobian from the
    unprojected one, without forming the projection)."""

    jtj: np.ndarray
    grad: np.ndarray


def _products(J: Any, e: np.ndarray, P: int) -> tuple[np.ndarray, np.ndarray]:
    """``J'J`` and ``J'e`` of a batch, from ``J`` (B, ..., P) or a :class:`Normal`."""
    if isinstance(J, Normal):
        return np.asarray(J.jtj, dtype=float), np.asarray(J.grad, dtype=float)
    B = e.shape[0]
    Jr = J.reshape(B, -1, P)
    Jt = np.swapaxes(Jr, 1, 2)
    return Jt @ Jr, (Jt @ e.reshape(B, -1)[:, :, None])[..., 0]


def sum_of_squares(e: np.ndarray) -> np.ndarray:
    """``sum e^2`` over all but the leading axis; ``inf`` where not finite."""
    c = np.sum((e * e).reshape(e.shape[0], -1), axis=1)
    return np.where(np.isfinite(c), c, np.inf)


def solve_spd(lhs: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Batched ``lhs x = rhs`` for (B, P, P) and (B, P); NaN rows where singular."""
    try:
        return np.linalg.solve(lhs, rhs[..., None])[..., 0]
    except np.linalg.LinAlgError:
        out = np.full(rhs.shape, np.nan)
        for i in range(lhs.shape[0]):  # only reached when some system is singular
            try:
                out[i] = np.linalg.solve(lhs[i], rhs[i])
            except np.linalg.LinAlgError:
                pass
        return out


class TimeBudget:
    """Wall-clock budget shared by several solves: the seconds left for the next one.

    Parameters
    ----------
    seconds : float or None
        The whole budget; ``None`` for no limit.
    """

    def __init__(self, seconds: float | None) -> None:
        self.end = None if seconds is None else time.perf_counter() + float(seconds)

    def left(self) -> float | None:
        """Seconds left (0.0 once spent), or ``None`` without a limit."""
        return None if self.end is None else max(self.end - time.perf_counter(), 0.0)


def levenberg_marquardt(
    theta0: np.ndarray,
    prob: Any,
    evaluate: Callable[[np.ndarray, Any, bool], tuple],
    scale: np.ndarray,
    max_iter: int = 100,
    xtol: float = 1e-10,
    ftol: float = 1e-20,
    time_budget: float | None = None,
    stall_tol: float = 0.0,
    damping: float = 1e-3,
    settle: float = 0.0,
) -> Solution:
    """Batched Levenberg-Marquardt with per-row damping, convergence and failure.

    Parameters
    ----------
    theta0 : ndarray, shape (B, P)
        Starting parameters, one row per problem.
    prob : object
        The problems' data; it must offer ``take(idx)`` returning the sub-batch of
        rows ``idx`` (only active rows are evaluated).
    evaluate : callable
        ``evaluate(theta, prob, jacobian)`` returns the residuals ``e`` of shape
        (B, ...) and, when ``jacobian`` is true, ``de / dtheta`` of shape
        (B, ..., P) or its products as a :class:`Normal` (else ``None``);
        optionally a third value, any per-row array (B, ...) carried along with
        the accepted parameters and returned as :attr:`Solution.aux` (e.g.
        parameters eliminated by variable projection).
    scale : ndarray, shape (B,)
        Size of a cost that counts as exact zero, times 1e28 (e.g. the sum of
        squares of the data).
    max_iter : int
        Iteration cap per row.
    xtol : float
        Relative step size at which an accepted step counts as converged.
    ftol : float
        Predicted relative decrease of the cost at which a row has converged.
    time_budget : float, optional
        Wall-clock seconds after which the rows still iterating stop, reported as
        not converged (status 2).
    stall_tol : float
        A row whose damping runs away (no step lowers the cost) while the
        Gauss-Newton step predicts a relative decrease below ``stall_tol`` has
        reached the rounding level of its cost and counts as converged (default 0:
        never).
    damping : float
        Starting damping, relative to the diagonal of ``J'J`` (default 1e-3; a
        smaller one suits starts close to the solution, such as bootstrap refits
        started from the point estimate: nearly Gauss-Newton steps from the first).
        The damping shrinks after successful steps down to ``min(1e-12, damping)``.
    settle : float
        A row whose step is rejected while its cost is at most ``settle * scale``
        has converged: its residuals are already as small as the problem asks
        (e.g. equations solved to their rounding level), and raising the damping
        until it runs away would only cost iterations (default 0: never).

    Returns
    -------
    Solution
    """
    t_end = None if time_budget is None else time.perf_counter() + float(time_budget)
    theta = np.array(theta0, dtype=float)
    B, P = theta.shape
    out = evaluate(theta, prob, True)
    e, J = out[0], out[1]
    aux = np.array(out[2]) if len(out) > 2 else None
    assert J is not None
    ef = np.array(e.reshape(B, -1))
    NJ, NG = _products(J, ef, P)  # J'J and J'e of every row at its current point
    cost = sum_of_squares(ef)
    scale = np.broadcast_to(np.asarray(scale, dtype=float), (B,))
    lam = np.full(B, float(damping))
    floor = min(1e-12, float(damping))  # the damping never shrinks below this
    nu = np.full(B, 2.0)
    converged = np.zeros(B, dtype=bool)
    status = np.ones(B, dtype=int)
    failed = (
        ~np.isfinite(cost)
        | ~np.all(np.isfinite(NJ), axis=(1, 2))
        | ~np.all(np.isfinite(NG), axis=1)
    )
    status[failed] = 4
    iters = np.zeros(B, dtype=int)
    eye = np.eye(P)
    prev = np.full(B, np.inf)  # previous predicted decrease
    for _ in range(max_iter):
        act = np.flatnonzero(~converged & ~failed)
        if act.size == 0:
            break
        if t_end is not None and time.perf_counter() > t_end:
            status[act] = 2
            break
        iters[act] += 1
        JtJ = NJ[act]
        grad = NG[act]
        diag = np.diagonal(JtJ, axis1=1, axis2=2)
        Dm = np.maximum(diag, 1e-12 * np.max(diag, axis=1, keepdims=True) + 1e-300)
        # the undamped step (with a rounding-level ridge) and its predicted decrease
        gn = -solve_spd(JtJ + (1e-14 * Dm)[:, :, None] * eye, grad)
        pred = -np.einsum("bp,bp->b", gn, grad)
        # a Gauss-Newton prediction below ftol outside the rounding zone: the cost
        # cannot fall by more than that, the row has converged where it is (with
        # ftol below the zone's 1e-12 this never fires and rows converge inside it)
        settled = (
            np.isfinite(pred) & (pred <= ftol * cost[act]) & (pred > _ROUNDING_ZONE * cost[act])
        )
        if np.any(settled):
            converged[act[settled]] = True
            keep = ~settled
            act, JtJ, grad, gn, pred = act[keep], JtJ[keep], grad[keep], gn[keep], pred[keep]
            Dm = Dm[keep]
            if act.size == 0:
                break
        zone = np.all(np.isfinite(gn), axis=1) & (pred <= _ROUNDING_ZONE * cost[act])
        size = np.max(np.abs(theta[act]), axis=1) + xtol
        tiny_gn = np.max(np.abs(gn), axis=1) <= xtol * size
        done = zone & ((pred <= ftol * cost[act]) | tiny_gn | (pred > 0.1 * prev[act]))
        prev[act] = np.where(zone, pred, np.inf)
        flat = cost[act] <= 1e-28 * scale[act]
        delta = -solve_spd(JtJ + (lam[act, None] * Dm)[:, :, None] * eye, grad)
        ok_step = np.all(np.isfinite(delta), axis=1)
        delta = np.where(ok_step[:, None], delta, 0.0)
        tiny = np.max(np.abs(delta), axis=1) <= xtol * size
        trial = theta[act] + np.where(zone[:, None], gn, delta)
        # every row still iterating (in order): the problems need no copy
        out = evaluate(trial, prob if act.size == B else prob.take(act), True)
        e_new, J_new = out[0], out[1]
        assert J_new is not None
        e_new = e_new.reshape(act.size, -1)
        nj_new, ng_new = _products(J_new, e_new, P)
        c_new = sum_of_squares(e_new)
        cost_old = cost[act]
        with np.errstate(invalid="ignore"):
            finite = (
                np.isfinite(c_new)
                & np.all(np.isfinite(nj_new), axis=(1, 2))
                & np.all(np.isfinite(ng_new), axis=1)
            )
        accept = finite & (zone | (ok_step & (c_new < cost[act])))
        idx = act[accept]
        theta[idx] = trial[accept]
        cost[idx] = c_new[accept]
        NJ[idx] = nj_new[accept]
        NG[idx] = ng_new[accept]
        ef[idx] = e_new[accept]
        if aux is not None:
            aux[idx] = out[2][accept]
        # Nielsen's damping update from the gain ratio (actual / predicted decrease)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            pred_d = -np.einsum("bp,bp->b", delta, 2.0 * grad + np.einsum("bpq,bq->bp", JtJ, delta))
            rho = np.where(pred_d > 0, (cost_old - c_new) / pred_d, 0.0)
        shrink = np.maximum(1.0 / 3.0, 1.0 - (2.0 * np.clip(rho, 0.0, 1.0) - 1.0) ** 3)
        lam[act] = np.where(accept, np.maximum(lam[act] * shrink, floor), lam[act] * nu[act])
        nu[act] = np.where(accept, 2.0, nu[act] * 2.0)
        stuck = ~accept & (cost_old <= settle * scale[act])
        converged[act] = (done & accept) | (accept & tiny & ~zone) | flat | stuck
        runaway = (lam[act] > _LAM_MAX) & ~converged[act]
        at_rounding = runaway & np.isfinite(pred) & (pred <= stall_tol * cost[act])
        converged[act] |= at_rounding
        runaway &= ~at_rounding
        failed[act] = runaway
        status[act[runaway]] = 3
    status[converged] = 0
    return Solution(
        theta=theta,
        cost=cost,
        converged=converged,
        iterations=iters,
        status=status,
        residuals=ef,
        aux=aux,
    )
