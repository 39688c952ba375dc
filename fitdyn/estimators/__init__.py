"""Estimators of the system matrix: a registry and one dispatcher.

Every estimator has the same signature and result type (:class:`Estimate`); the
dispatcher :func:`estimate` picks one by name (``"auto"`` chooses from the data and
records why in the result's notes).
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

import numpy as np

from fitdyn.estimators.base import Design, Estimate, Estimator, SystemBatch, lstsq
from fitdyn.recording import Recording

__all__ = [
    "METHODS",
    "Design",
    "Estimate",
    "Estimator",
    "SystemBatch",
    "lstsq",
    "get_estimator",
    "estimate",
]

#: method name -> (module, class name)
_REGISTRY: dict[str, tuple[str, str]] = {
    "derivative": ("fitdyn.estimators.derivative", "DerivativeEstimator"),
    "integral": ("fitdyn.estimators.integral", "IntegralEstimator"),
    "discrete": ("fitdyn.estimators.discrete", "DiscreteEstimator"),
    "instrumental": ("fitdyn.estimators.instrumental", "InstrumentalEstimator"),
    "trajectory": ("fitdyn.estimators.trajectory", "TrajectoryEstimator"),
    "kalman": ("fitdyn.estimators.statespace", "KalmanEstimator"),
    "prediction": ("fitdyn.estimators.prediction", "PredictionEstimator"),
    "nonlinear-iv": ("fitdyn.estimators.nonlinear_iv", "NonlinearIVEstimator"),
}

#: Names accepted by :func:`estimate` (``"auto"`` included).
METHODS: tuple[str, ...] = ("auto", *_REGISTRY)


def get_estimator(method: str, **settings: Any) -> Estimator:
    """An estimator instance by name.

    Parameters
    ----------
    method : str
        One of :data:`METHODS` except ``"auto"``.
    **settings
        Passed to the estimator's constructor.
    """
    from fitdyn.errors import EstimationError

    if method not in _REGISTRY:
        raise EstimationError(f"unknown method '{method}'; choose one of: {', '.join(METHODS)}")
    module, cls = _REGISTRY[method]
    return getattr(import_module(module), cls)(**settings)


def estimate(
    rec: Recording,
    method: str = "auto",
    equilibrium: np.ndarray | None = None,
    **settings: Any,
) -> tuple[Estimate, Estimator]:
    """Fit a recording with one estimator.

    Parameters
    ----------
    rec : Recording
    method : str
        ``"auto"`` (default) or one of the registered names.
    equilibrium : array-like of 2 floats, optional
        A known equilibrium; by default it is estimated.
    **settings
        Estimator settings (ignored by ``auto`` unless they apply to its choice).

    Returns
    -------
    estimate : Estimate
    estimator : Estimator
        The instance used (the bootstrap reuses it).
    """
    eq = None if equilibrium is None else np.asarray(equilibrium, dtype=float).reshape(2)
    if method == "auto":
        from fitdyn.estimators.auto import choose_and_fit

        return choose_and_fit(rec, eq, **settings)
    est = get_estimator(method, **settings)
    return est.fit(rec, eq), est
