"""Integral-form regression: no derivatives, only running integrals of the samples.

Integrating ``dx/dt = A x + b`` over a gap-free segment that starts at ``t_0``,

    x(t_i) = x(t_0) + A integral_{t_0}^{t_i} x dt + b (t_i - t_0),

which is linear in ``A``, ``b`` and the segment's starting state.  The integrals are
running trapezoid sums within each segment (the rule of
:func:`scipy.integrate.cumulative_trapezoid`, computed for all segments and
replicates at once), and each segment gets its own intercept, which absorbs the
measurement noise of its first sample instead of differencing against it.  With a
known equilibrium ``x*`` the integrand is ``x - x*`` and there is no ``b`` column.

The method needs no derivative and no uniform step, and its regressors are smoothed
sums, so it is the robust fast estimate.  Two caveats:

* the trapezoid rule has a relative error of order ``(h |lambda|)^2 / 12``;
* the rows are strongly correlated (every row shares the integral of all earlier
  samples), so the OLS covariance is only indicative and resampling must use
  blocks within segments, never single rows.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from fitdyn.errors import TooFewSamplesError
from fitdyn.estimators.base import Design, Estimator, SystemBatch
from fitdyn.estimators.derivative import (
    center_within,
    check_equilibrium,
    regression_covariance,
    reject_unknown,
    replicate_values,
    segment_groups,
)
from fitdyn.recording import Recording

__all__ = ["IntegralEstimator", "running_integral"]


def running_integral(times: np.ndarray, values: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Trapezoid integral from each segment's first sample, for every sample.

    Parameters
    ----------
    times : ndarray, shape (n,)
    values : ndarray, shape (..., n, k)
    groups : int ndarray, shape (n,)
        Segment of each sample (contiguous runs); integrals restart at each run.

    Returns
    -------
    ndarray, shape (..., n, k)
        Zero at each segment's first sample, as ``cumulative_trapezoid(...,
        initial=0)`` applied segment by segment.
    """
    t = np.asarray(times, dtype=float)
    V = np.asarray(values, dtype=float)
    n = t.shape[0]
    inc = np.zeros_like(V)
    if n > 1:
        same = groups[1:] == groups[:-1]
        h = np.where(same, np.diff(t), 0.0)
        inc[..., 1:, :] = 0.5 * (V[..., 1:, :] + V[..., :-1, :]) * h[:, None]
    cum = np.cumsum(inc, axis=-2)
    start = np.flatnonzero(np.concatenate([[True], groups[1:] != groups[:-1]]))
    first = np.repeat(start, np.diff(np.concatenate([start, [n]])))
    return cum - cum[..., first, :]


class IntegralEstimator(Estimator):
    """Least squares of the integral form, one intercept per gap-free segment.

    Notes
    -----
    The regressors are ``(integral x1, integral x2, t - t_0)`` per segment (or the
    integrals of ``x - x*`` for a known equilibrium); the targets are the samples
    themselves.  Measurement noise in the targets is harmless; in the integrals it
    is averaged.  The fitted intercepts are the starting states of the segments
    (``extra["segment_initial_states"]``).
    """

    name = "integral"
    needs_uniform_steps = False
    is_regression = True

    def __init__(self, **unknown: Any) -> None:
        reject_unknown(self.name, unknown, ())
        super().__init__(rule="trapezoid")

    def design(
        self,
        rec: Recording,
        equilibrium: np.ndarray | None = None,
        values: np.ndarray | None = None,
    ) -> Design:
        """Rows ``x(t_i) = c_segment + A I(t_i) + b (t_i - t_0)`` of a recording."""
        eq = check_equilibrium(equilibrium)
        V, batched = replicate_values(rec, values)
        groups, bounds = segment_groups(rec)
        t = np.asarray(rec.times, dtype=float)
        n = rec.n_samples
        p = 2 if eq is not None else 3
        if n - len(bounds) < p:
            raise TooFewSamplesError(
                f"the integral regression has {n} samples in {len(bounds)} segment(s), "
                f"too few for {p} coefficients per channel plus one start per segment; "
                "record more samples per segment",
                source=rec.source,
            )
        X = V - eq if eq is not None else V
        integ = running_integral(t, X, groups)  # (B, n, 2)
        if eq is None:
            t0 = t[[a for a, _ in bounds]][groups]
            elapsed = np.broadcast_to((t - t0)[None, :, None], (V.shape[0], n, 1))
            Z = np.concatenate([integ, elapsed], axis=-1)
        else:
            Z = integ
        info = {"equilibrium": eq, "n_segments": len(bounds)}
        return Design(
            Z=Z if batched else Z[0],
            Y=V if batched else V[0],
            groups=groups,
            row_segment=groups,
            row_trajectory=np.asarray(rec.trajectory),
            row_index=np.arange(n),
            info=info,
        )

    def to_system(self, C: np.ndarray, c: np.ndarray, design: Design) -> SystemBatch:
        """``A`` from the integral columns, ``b`` from the elapsed-time column."""
        A = np.swapaxes(C[:, :2, :], -1, -2)
        eq = design.info["equilibrium"]
        b = -A @ eq if eq is not None else C[:, 2, :]
        valid = np.all(np.isfinite(A), axis=(-2, -1)) & np.all(np.isfinite(b), axis=-1)
        return SystemBatch(matrix=A, offset=b, valid=valid)

    # -- hooks --------------------------------------------------------------------------
    def parameter_covariance(
        self, d: Design, C: np.ndarray, c: np.ndarray, rcov: np.ndarray, sysb: SystemBatch
    ) -> np.ndarray | None:
        """OLS covariance with the segment intercepts projected out (rows assumed independent)."""
        Z = center_within(np.asarray(d.Z, dtype=float), d.groups)
        return regression_covariance(Z, rcov, d.info["equilibrium"])

    def notes(self, rec: Recording, d: Design, sysb: SystemBatch) -> list[str]:
        """Integration rule, intercepts, and the row-correlation caveat."""
        return [
            f"running trapezoid integrals within {d.info['n_segments']} gap-free segment(s), "
            "one fitted starting state per segment",
            "rows of the integral form are strongly correlated (each shares all earlier "
            "samples): the OLS covariance is indicative only, and resampling must use "
            "blocks within segments, not single rows",
        ]

    def extra(
        self, rec: Recording, d: Design, C: np.ndarray, c: np.ndarray, sysb: SystemBatch
    ) -> dict[str, Any]:
        """Fitted starting state of each segment."""
        return {"segment_initial_states": np.asarray(c, dtype=float).copy()}
