"""Speed of the state-space (Kalman/EM) estimator: point fit and batched refits.

Prints a table: the point fit of one record (EM steps, Newton steps, seconds) and
``fit_values`` on B replicates simulated from the fitted model (seconds, valid
share).  Run with one BLAS thread: ``OPENBLAS_NUM_THREADS=1 python
benchmarks/kalman_speed.py``.
"""

from __future__ import annotations

import time

import numpy as np

from fitdyn.estimators.statespace import KalmanEstimator
from fitdyn.simulate import simulate

A = np.array([[-0.3, 1.2], [-1.0, -0.2]])
XS = np.array([2.0, -1.0])
Q = np.array([[0.05, 0.01], [0.01, 0.04]])
SD = np.array([0.15, 0.1])


def main() -> None:
    print(
        f"{'samples':>8} {'what':<28} {'B':>5} {'seconds':>8} {'EM':>5} {'Newton':>6} {'valid':>6}"
    )
    for n in (300, 1000):
        times = np.linspace(0, n / 10, n)
        rec = simulate(A, XS, [4.0, 1.0], times, process_noise=Q, measurement_noise=SD, seed=1)
        est = KalmanEstimator()
        t0 = time.perf_counter()
        fit = est.fit(rec)
        dt = time.perf_counter() - t0
        print(
            f"{n:>8} {'point fit (with param_cov)':<28} {1:>5} {dt:>8.2f} "
            f"{fit.extra['iterations']:>5} {fit.extra['newton_steps']:>6} {'':>6}"
        )
        t0 = time.perf_counter()
        KalmanEstimator(covariance=False).fit(rec)
        dt = time.perf_counter() - t0
        print(f"{n:>8} {'point fit (no param_cov)':<28} {1:>5} {dt:>8.2f}")
        for B in (100, 500) if n == 300 else (100,):
            V = simulate(
                fit.matrix, fit.equilibrium, fit.extra["initial_states"], times,
                process_noise=fit.extra["process_noise"],
                measurement_cov=fit.extra["measurement_cov"], seed=2, replicates=B,
            ).values  # fmt: skip
            t0 = time.perf_counter()
            out = est.fit_values(rec, V)
            dt = time.perf_counter() - t0
            print(
                f"{n:>8} {'fit_values (parametric)':<28} {B:>5} {dt:>8.2f} {'':>5} {'':>6} "
                f"{out.valid.mean():>6.3f}"
            )


if __name__ == "__main__":
    main()
