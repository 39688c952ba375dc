"""Exact-discretisation simulator of two-channel linear dynamics near an equilibrium.

The model is the linear stochastic differential equation

    dx = A (x - x*) dt + Q^{1/2} dW,        y_i = x(t_i) + e_i,   e_i ~ N(0, R),

sampled at given times.  Between two samples a step ``h`` apart the state obeys,
exactly and without time-stepping error,

    x(t + h) - x* = F (x(t) - x*) + w,   F = expm(A h),
    Cov(w) = integral_0^h expm(A s) Q expm(A s)^T ds,

and ``Cov(w)`` is computed by Van Loan's block-matrix exponential (Van Loan,
"Computing integrals involving the matrix exponential", IEEE Trans. Automatic Control
23, 1978), which holds for any ``A``; for a stable ``A`` it equals ``P - F P F^T`` with
``P`` the stationary covariance solving the Lyapunov equation ``A P + P A^T + Q = 0``.

The simulator serves the tests, the demo data and the parametric bootstrap: with
``replicates=B`` it draws ``B`` independent copies at once, vectorised across
replicates and trajectories (the only Python loop runs over time steps).  The plain
call is the one-replicate case of the same code.  Simulated data are invented data:
they show what the linear model does, not what a real system will do.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from fitdyn.atomic import write_with
from fitdyn.errors import InputError, ReportError, TimeError
from fitdyn.linalg2 import expm as _expm2
from fitdyn.recording import KEPT, CleaningLog, Recording, RowFate

__all__ = ["simulate", "discretise", "SimulatedBatch", "write_csv"]

#: Steps closer than this fraction of the longest step share one precomputed F, Cov(w).
_STEP_RESOLUTION = 1e-10

_METHODS = ("van-loan", "lyapunov")


# ----------------------------------------------------------------------------------
# input checks
# ----------------------------------------------------------------------------------
def _matrix(matrix: Any) -> np.ndarray:
    A = np.asarray(matrix, dtype=float)
    if A.shape != (2, 2):
        raise InputError(f"matrix must be 2x2, got shape {A.shape}; pass [[a, b], [c, d]]")
    if not np.all(np.isfinite(A)):
        raise InputError("matrix has a non-finite entry; give finite numbers")
    return A


def _vector2(value: Any, name: str) -> np.ndarray:
    v = np.asarray(value, dtype=float)
    if v.shape != (2,):
        raise InputError(f"{name} must have two entries (one per channel), got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise InputError(f"{name} has a non-finite entry; give finite numbers")
    return v


def _covariance(value: Any, name: str) -> np.ndarray:
    """A 2x2 symmetric positive semi-definite matrix from a scalar or a 2x2 array."""
    C = np.asarray(value, dtype=float)
    if C.ndim == 0:
        if not np.isfinite(C) or C < 0:
            raise InputError(f"{name} must be a finite number >= 0, got {float(C)!r}")
        return float(C) * np.eye(2)
    if C.shape != (2, 2):
        raise InputError(
            f"{name} must be a scalar or a 2x2 covariance matrix, got shape {C.shape}; "
            "for independent channels pass np.diag([v1, v2])"
        )
    if not np.all(np.isfinite(C)):
        raise InputError(f"{name} has a non-finite entry; give finite numbers")
    scale = max(float(np.max(np.abs(C))), 1e-300)
    if np.max(np.abs(C - C.T)) > 1e-12 * scale:
        raise InputError(f"{name} must be symmetric, got {C.tolist()}")
    if np.min(np.linalg.eigvalsh(C)) < -1e-12 * scale:
        raise InputError(f"{name} must be positive semi-definite, got {C.tolist()}")
    return 0.5 * (C + C.T)


def _measurement(sd: Any, cov: Any) -> np.ndarray | None:
    """The measurement covariance R from standard deviations or a full matrix."""
    if sd is not None and cov is not None:
        raise InputError(
            "give measurement_noise (standard deviations) or measurement_cov, not both"
        )
    if cov is not None:
        return _covariance(cov, "measurement_cov")
    if sd is None:
        return None
    s = np.asarray(sd, dtype=float)
    if s.ndim == 0:
        s = np.full(2, float(s))
    if s.shape != (2,):
        raise InputError(
            "measurement_noise must be one standard deviation or two (one per channel), "
            f"got shape {s.shape}; pass a full 2x2 covariance as measurement_cov"
        )
    if not np.all(np.isfinite(s)) or np.any(s < 0):
        raise InputError(f"measurement_noise standard deviations must be >= 0, got {s.tolist()}")
    return np.diag(s**2)


def _times(times: Any, trajectories: int | None) -> list[np.ndarray]:
    """Per-trajectory time arrays (shared times repeated)."""
    shared: np.ndarray | None = None
    per: list[np.ndarray] | None = None
    if isinstance(times, (list, tuple)) and len(times) and all(np.ndim(t) == 1 for t in times):
        per = [np.asarray(t, dtype=float) for t in times]
    else:
        arr = np.asarray(times, dtype=float)
        if arr.ndim == 1:
            shared = arr
        elif arr.ndim == 2:
            per = list(arr)
        else:
            raise TimeError(
                "times must be one array of sample times (shared by all trajectories) "
                f"or one array per trajectory, got shape {arr.shape}"
            )
    if per is not None:
        if trajectories is not None and trajectories != len(per):
            raise InputError(
                f"times holds {len(per)} arrays but trajectories={trajectories}; "
                "give one time array per trajectory or a single shared array"
            )
        out = per
    else:
        out = [shared] * (trajectories or 1)
    for r, t in enumerate(out):
        where = f"trajectory {r + 1}"
        if t.size == 0:
            raise TimeError(f"{where}: no sample times; give at least one time")
        if not np.all(np.isfinite(t)):
            k = int(np.flatnonzero(~np.isfinite(t))[0])
            raise TimeError(f"{where}: time at position {k} is not finite; give finite times")
        d = np.diff(t)
        if np.any(d <= 0):
            k = int(np.flatnonzero(d <= 0)[0]) + 1
            raise TimeError(
                f"{where}: times must increase strictly, but position {k} "
                f"({t[k]!r}) does not follow {t[k - 1]!r}; sort the times and remove repeats"
            )
    return out


def _rng(seed: Any) -> np.random.Generator:
    return np.random.default_rng(seed)


def _sqrt_psd(C: np.ndarray) -> np.ndarray:
    """A factor S with S S^T = C for symmetric PSD matrices (..., 2, 2), singular allowed."""
    w, V = np.linalg.eigh(C)
    return V * np.sqrt(np.clip(w, 0.0, None))[..., None, :]


# ----------------------------------------------------------------------------------
# exact discretisation
# ----------------------------------------------------------------------------------
def _van_loan(A: np.ndarray, Q: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """Cov(w) for each step by Van Loan's block exponential (any A)."""
    from scipy.linalg import expm

    # expm([[-A, Q], [0, A^T]] h) = [[., G], [0, E]] with E = expm(A h)^T and
    # Cov(w) = E^T G (Van Loan 1978, theorem 1).
    M = np.zeros((4, 4))
    M[:2, :2] = -A
    M[:2, 2:] = Q
    M[2:, 2:] = A.T
    with np.errstate(over="ignore", invalid="ignore"):
        blocks = expm(M[None, :, :] * steps[:, None, None])
        E = blocks[:, 2:, 2:]
        G = blocks[:, :2, 2:]
        C = np.swapaxes(E, -1, -2) @ G
    return C


def _lyapunov(A: np.ndarray, Q: np.ndarray, F: np.ndarray) -> np.ndarray:
    """Cov(w) = P - F P F^T with the stationary P (A stable only)."""
    from scipy.linalg import solve_continuous_lyapunov

    P = solve_continuous_lyapunov(A, -Q)
    P = 0.5 * (P + P.T)
    return P - F @ P @ np.swapaxes(F, -1, -2)


def _stable(A: np.ndarray) -> bool:
    return bool(np.max(np.linalg.eigvals(A).real) < 0)


def discretise(
    matrix: Any,
    steps: Any,
    process_noise: Any = None,
    method: str = "van-loan",
) -> tuple[np.ndarray, np.ndarray]:
    """One-step transition matrices and noise covariances of the linear model.

    Parameters
    ----------
    matrix : array_like, shape (2, 2)
        System matrix ``A`` of ``dx = A (x - x*) dt + Q^{1/2} dW``.
    steps : float or array_like, shape (m,)
        Step lengths ``h >= 0``.
    process_noise : float or array_like (2, 2), optional
        Diffusion covariance rate ``Q`` (a scalar ``q`` means ``q * I``).  ``None``
        means no process noise (the covariances are zero).
    method : {"van-loan", "lyapunov"}
        ``"van-loan"`` (default) uses Van Loan's block-matrix exponential and works
        for any ``A``; where it overflows (very long steps) and ``A`` is stable it
        falls back to the Lyapunov form.  ``"lyapunov"`` uses ``P - F P F^T`` with
        ``A P + P A^T + Q = 0`` and requires a stable ``A``.

    Returns
    -------
    F : ndarray, shape (m, 2, 2)
        ``expm(A h)`` for each step.
    C : ndarray, shape (m, 2, 2)
        ``Cov(w) = integral_0^h expm(A s) Q expm(A s)^T ds`` for each step
        (symmetrised).
    """
    A = _matrix(matrix)
    h = np.atleast_1d(np.asarray(steps, dtype=float))
    if h.ndim != 1 or not np.all(np.isfinite(h)) or np.any(h < 0):
        raise InputError("steps must be finite numbers >= 0 in a one-dimensional array")
    if method not in _METHODS:
        raise InputError(f"method must be one of {_METHODS}, got {method!r}")
    F = _expm2(A, h)
    if process_noise is None:
        return F, np.zeros_like(F)
    Q = _covariance(process_noise, "process_noise")
    if method == "lyapunov":
        if not _stable(A):
            raise InputError(
                "method='lyapunov' needs a stable matrix (all eigenvalues with negative "
                "real part); use method='van-loan'"
            )
        C = _lyapunov(A, Q, F)
    else:
        C = _van_loan(A, Q, h)
        bad = ~np.all(np.isfinite(C), axis=(-2, -1))
        if np.any(bad):
            if not _stable(A):
                raise InputError(
                    "the noise covariance of a step overflows (steps too long for this "
                    f"unstable matrix, longest {float(h.max())!r}); use shorter times"
                )
            C[bad] = _lyapunov(A, Q, F[bad])
    return F, 0.5 * (C + np.swapaxes(C, -1, -2))


# ----------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class SimulatedBatch:
    """Many independent simulated copies of one sampling design.

    Attributes
    ----------
    times : ndarray, shape (n,)
        Sample times, trajectory after trajectory (the layout of a Recording).
    trajectory : ndarray of int, shape (n,)
        Trajectory code 0..R-1 of each sample.
    values : ndarray, shape (B, n, 2)
        The simulated measurements of each replicate.
    channels : tuple of str
        Channel names.
    units : tuple of (str or None)
        Channel units.
    time_unit : str or None
        Unit of ``times``.
    trajectory_names : tuple of str
        ``"1"`` .. ``"R"``.
    notes : tuple of str
        The model and noise used.
    """

    times: np.ndarray
    trajectory: np.ndarray
    values: np.ndarray
    channels: tuple[str, str]
    units: tuple[str | None, str | None]
    time_unit: str | None
    trajectory_names: tuple[str, ...]
    notes: tuple[str, ...] = ()

    @property
    def n_replicates(self) -> int:
        """Number of replicates ``B``."""
        return int(self.values.shape[0])

    @property
    def n_samples(self) -> int:
        """Samples per replicate."""
        return int(self.times.shape[0])

    def recording(self, replicate: int = 0) -> Recording:
        """Replicate ``replicate`` as a :class:`~fitdyn.recording.Recording`."""
        return _make_recording(
            self.times,
            self.trajectory,
            self.values[replicate],
            self.channels,
            self.units,
            self.time_unit,
            self.trajectory_names,
            self.notes,
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain lists, for JSON."""
        return {
            "times": self.times.tolist(),
            "trajectory": self.trajectory.tolist(),
            "values": self.values.tolist(),
            "channels": list(self.channels),
            "units": list(self.units),
            "time_unit": self.time_unit,
            "trajectory_names": list(self.trajectory_names),
            "notes": list(self.notes),
        }


def _make_recording(
    times: np.ndarray,
    trajectory: np.ndarray,
    values: np.ndarray,
    channels: tuple[str, str],
    units: tuple[str | None, str | None],
    time_unit: str | None,
    names: tuple[str, ...],
    notes: tuple[str, ...],
) -> Recording:
    n = times.shape[0]
    log = CleaningLog(
        source="simulated",
        fates=tuple(RowFate(row=i, status=KEPT) for i in range(n)),
        notes=notes,
    )
    return Recording(
        times=times.copy(),
        values=np.array(values, dtype=float),
        trajectory=trajectory.copy(),
        segment=trajectory.copy(),
        outlier=np.zeros(n, dtype=bool),
        source_rows=np.arange(n),
        channels=channels,
        units=units,
        time_unit=time_unit,
        trajectory_names=names,
        log=log,
        source="simulated",
    )


# ----------------------------------------------------------------------------------
# the simulator
# ----------------------------------------------------------------------------------
def simulate(
    matrix: Any,
    equilibrium: Any,
    x0: Any,
    times: Any,
    process_noise: Any = None,
    measurement_noise: Any = None,
    trajectories: int | None = None,
    seed: int | np.random.Generator | None = None,
    channels: Sequence[str] = ("x1", "x2"),
    replicates: int | None = None,
    *,
    measurement_cov: Any = None,
    time_unit: str | None = None,
    units: Sequence[str | None] = (None, None),
    method: str = "van-loan",
    overflow: str = "raise",
) -> Recording | SimulatedBatch:
    """Simulate ``dx = A (x - x*) dt + Q^{1/2} dW`` sampled with measurement noise.

    The state is propagated by the exact discretisation ``x(t+h) - x* = F (x(t) - x*)
    + w`` with ``F = expm(A h)`` and ``w ~ N(0, Cov(w))`` for each step (see
    :func:`discretise`), so any sampling, regular or not, is simulated without
    time-stepping error.  Measurements are ``y_i = x(t_i) + e_i`` with independent
    ``e_i ~ N(0, R)``.

    Parameters
    ----------
    matrix : array_like, shape (2, 2)
        System matrix ``A``.
    equilibrium : array_like, shape (2,), or None
        Equilibrium ``x*`` (``None``: the origin).
    x0 : array_like, shape (2,) or (R, 2)
        True (noise-free) state at the first time of each trajectory, shared by all
        trajectories or one row per trajectory.
    times : array_like, shape (n,), or sequence of R arrays
        Sample times shared by every trajectory, or one strictly increasing array
        per trajectory (irregular steps and different lengths allowed).
    process_noise : float or array_like (2, 2), optional
        Diffusion covariance rate ``Q`` (units of channel^2 per time unit); a scalar
        ``q`` means ``q * I``.  ``None`` or 0: deterministic dynamics.
    measurement_noise : float or array_like (2,), optional
        Standard deviations of the measurement errors: one for both channels or one
        per channel (independent channels, ``R = diag(sd^2)``).
    trajectories : int, optional
        Number of trajectories ``R``.  Inferred from ``x0`` of shape (R, 2) or from a
        sequence of R time arrays; a conflicting value raises.  Default 1.
    seed : int, numpy Generator or None
        Seed of ``np.random.default_rng``; the same seed gives the same numbers.
    channels : pair of str
        Channel names (default ``("x1", "x2")``).
    replicates : int, optional
        Number ``B`` of independent copies.  ``None`` (default) returns one
        :class:`~fitdyn.recording.Recording`; an integer returns a
        :class:`SimulatedBatch` whose ``values`` have shape (B, n, 2).  Both are the
        same computation (the plain call is ``B = 1``), vectorised over replicates.
    measurement_cov : array_like (2, 2) or float, optional
        Full measurement covariance ``R`` instead of ``measurement_noise`` (a scalar
        here is a variance).
    time_unit : str, optional
        Unit of the times, stored in the result.
    units : pair of (str or None)
        Units of the channels, stored in the result.
    method : {"van-loan", "lyapunov"}
        How ``Cov(w)`` is computed; see :func:`discretise`.
    overflow : {"raise", "nan"}
        What a value that overflows does: raise :class:`~fitdyn.errors.InputError`
        (default), or, with ``replicates``, make its whole replicate NaN and keep the
        others (the bootstrap then counts that replicate as failed).

    Returns
    -------
    Recording or SimulatedBatch
        A Recording with trajectory names ``"1"`` .. ``"R"``, one gap-free segment
        per trajectory and a cleaning log in which every sample is a ``"kept"`` row
        (source ``"simulated"``, row numbers 0..n-1 in output order); or, with
        ``replicates``, a :class:`SimulatedBatch`.

    Notes
    -----
    Steps that agree to a relative ``1e-10`` of the longest step share one
    precomputed ``F`` and ``Cov(w)``.  Random numbers are drawn in a fixed order
    (the process noise step by step, then all measurement noise), so results depend
    only on the seed and the arguments; memory is about three copies of the output
    (chunk ``replicates`` for very large batches).  Simulated data show what the
    linear model does, not what a real system will do.
    """
    if overflow not in ("raise", "nan"):
        raise InputError(f"overflow must be 'raise' or 'nan', got {overflow!r}")
    A = _matrix(matrix)
    xs = np.zeros(2) if equilibrium is None else _vector2(equilibrium, "equilibrium")
    start = np.asarray(x0, dtype=float)
    if start.ndim == 1:
        start = _vector2(start, "x0")[None, :]
    elif start.ndim != 2 or start.shape[1] != 2:
        raise InputError(f"x0 must have shape (2,) or (trajectories, 2), got {start.shape}")
    elif not np.all(np.isfinite(start)):
        raise InputError("x0 has a non-finite entry; give finite numbers")
    if trajectories is not None and (int(trajectories) != trajectories or trajectories < 1):
        raise InputError(f"trajectories must be a positive integer, got {trajectories!r}")
    n_from_x0 = start.shape[0] if start.shape[0] > 1 else None
    if n_from_x0 is not None and trajectories is not None and trajectories != n_from_x0:
        raise InputError(f"x0 has {n_from_x0} rows but trajectories={trajectories}")
    t_list = _times(times, trajectories if trajectories is not None else n_from_x0)
    R = len(t_list)
    if start.shape[0] not in (1, R):
        raise InputError(f"x0 has {start.shape[0]} rows but there are {R} trajectories")
    start = np.broadcast_to(start, (R, 2))
    B = 1 if replicates is None else int(replicates)
    if replicates is not None and (B != replicates or B < 1):
        raise InputError(f"replicates must be a positive integer, got {replicates!r}")
    chans = tuple(str(c) for c in channels)
    if len(chans) != 2:
        raise InputError(f"channels must name two channels, got {list(chans)}")
    unit_pair = tuple(units)
    if len(unit_pair) != 2:
        raise InputError(f"units must give two entries, got {list(unit_pair)}")
    Rm = _measurement(measurement_noise, measurement_cov)
    Q = None if process_noise is None else _covariance(process_noise, "process_noise")
    if Q is not None and not np.any(Q):
        Q = None
    rng = _rng(seed)

    # padded step table: one row per trajectory, zero steps past a trajectory's end
    lengths = np.array([t.size for t in t_list])
    L = int(lengths.max())
    H = np.zeros((R, max(L - 1, 0)))
    for r, t in enumerate(t_list):
        H[r, : t.size - 1] = np.diff(t)
    scale = float(H.max()) if H.size else 0.0
    if H.size:
        keys = np.rint(H / (scale * _STEP_RESOLUTION)).astype(np.int64)
        _, first, inverse = np.unique(keys.ravel(), return_index=True, return_inverse=True)
        inverse = inverse.reshape(H.shape)
        F_u, C_u = discretise(A, H.ravel()[first], Q, method=method)
    else:
        inverse = np.zeros((R, 0), dtype=np.int64)
        F_u = C_u = np.zeros((0, 2, 2))

    # propagate deviations from equilibrium: loop over steps, vectorised over (B, R);
    # the step axis leads so that each step writes one contiguous block
    dev = np.empty((L, B, R, 2))
    z = np.broadcast_to(start - xs, (B, R, 2)).copy()
    dev[0] = z
    S_u = _sqrt_psd(C_u) if Q is not None else None
    with np.errstate(over="ignore", invalid="ignore"):
        for k in range(L - 1):
            idx = inverse[:, k]
            z = np.einsum("rij,brj->bri", F_u[idx], z)
            if S_u is not None:
                z += np.einsum("rij,brj->bri", S_u[idx], rng.standard_normal((B, R, 2)))
            dev[k + 1] = z
    dev = dev.transpose(1, 2, 0, 3)  # (B, R, L, 2)
    if np.all(lengths == L):
        values = dev.reshape(B, R * L, 2) + xs  # trajectory-major, time within
    else:
        values = dev[:, np.arange(L)[None, :] < lengths[:, None]] + xs
    if Rm is not None and np.any(Rm):
        S_m = _sqrt_psd(Rm)
        e = rng.standard_normal(values.shape)
        values += e[..., :1] * S_m[:, 0] + e[..., 1:] * S_m[:, 1]
    if not np.all(np.isfinite(values)):
        if overflow != "nan" or replicates is None:
            raise InputError(
                "simulated values overflow (an unstable matrix over a long time span); "
                "shorten the times or start closer to the equilibrium"
            )
        # a replicate with an overflowing value is all NaN: whoever refits it counts
        # it as failed (the bootstrap), the others are kept
        values[~np.all(np.isfinite(values), axis=(1, 2))] = np.nan

    t_all = np.concatenate(t_list)
    traj = np.repeat(np.arange(R), lengths)
    names = tuple(str(r + 1) for r in range(R))
    seed_text = "a Generator" if isinstance(seed, np.random.Generator) else repr(seed)
    notes = (
        "simulated by exact discretisation: "
        f"A={A.tolist()}, x*={xs.tolist()}, "
        f"Q={None if Q is None else Q.tolist()}, R={None if Rm is None else Rm.tolist()}, "
        f"seed={seed_text}",
    )
    if replicates is None:
        return _make_recording(t_all, traj, values[0], chans, unit_pair, time_unit, names, notes)
    return SimulatedBatch(
        times=t_all,
        trajectory=traj,
        values=values,
        channels=chans,
        units=unit_pair,
        time_unit=time_unit,
        trajectory_names=names,
        notes=notes,
    )


# ----------------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------------
def _head(name: str, unit: str | None) -> str:
    return f"{name} [{unit}]" if unit else name


def _frame_of(result: Any, replicate: int | None):
    import pandas as pd

    if isinstance(result, pd.DataFrame):
        if replicate is not None:
            raise InputError("replicate applies to a SimulatedBatch, not to a DataFrame")
        return result
    if isinstance(result, SimulatedBatch):
        if replicate is None:
            if result.n_replicates != 1:
                raise InputError(
                    f"the batch holds {result.n_replicates} replicates; "
                    "choose one with replicate=<index>"
                )
            replicate = 0
        result = result.recording(replicate)
    elif replicate is not None:
        raise InputError("replicate applies to a SimulatedBatch, not to a Recording")
    if not isinstance(result, Recording):
        raise InputError(
            f"write_csv needs a Recording, a SimulatedBatch or a DataFrame, got {type(result)}"
        )
    cols: dict[str, Any] = {}
    if result.n_trajectories > 1:
        cols["run"] = [result.trajectory_names[k] for k in result.trajectory]
    cols[_head("time", result.time_unit)] = result.times
    for j in range(2):
        cols[_head(result.channels[j], result.units[j])] = result.values[:, j]
    return pd.DataFrame(cols)


def write_csv(
    result_or_frame: Any,
    path: str | os.PathLike[str],
    *,
    replicate: int | None = None,
    sep: str = ",",
    decimal: str = ".",
    float_format: str | None = None,
    comments: Sequence[str] = (),
) -> Path:
    """Write a simulated result (or any DataFrame) as a text table, atomically.

    The layout is the one :func:`fitdyn.read` reads: a header line, then one sample
    per line with the columns ``run`` (the trajectory name; written only when there
    is more than one trajectory), ``time`` and the two channels.  Units, when the
    result has them, go in brackets in the headers (``time [s]``, ``air [K]``).  A
    DataFrame is written as it is (its columns, no index).  The file is first written
    to a temporary file in the same folder and then moved into place with
    ``os.replace`` (:func:`fitdyn.atomic.write_with`), so a reader never sees a
    half-written file and a failed write leaves any previous file in place.

    Parameters
    ----------
    result_or_frame : Recording, SimulatedBatch or pandas.DataFrame
        What to write.
    path : str or path-like
        Destination file.
    replicate : int, optional
        Which replicate of a :class:`SimulatedBatch` to write (needed when it holds
        more than one).
    sep, decimal : str
        Field separator and decimal mark (e.g. ``";"`` and ``","``).
    float_format : str, optional
        printf-style format of floats (default: full precision).
    comments : sequence of str
        Lines written first, each prefixed with ``"# "``.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    frame = _frame_of(result_or_frame, replicate)
    dest = Path(path)

    def writer(tmp: Path) -> None:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            for line in comments:
                fh.write(f"# {line}\n")
            frame.to_csv(
                fh,
                sep=sep,
                decimal=decimal,
                float_format=float_format,
                index=False,
                lineterminator="\n",
            )
            fh.flush()
            os.fsync(fh.fileno())

    try:
        return write_with(dest, writer)
    except OSError as exc:
        raise ReportError(
            f"cannot write the table: {exc.strerror or exc}", source=str(dest)
        ) from exc
