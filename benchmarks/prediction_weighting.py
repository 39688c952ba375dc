"""Does the second (noise-weighted) pass of the prediction-error fit matter?

Datasets as in ``benchmarks/coverage.py`` scenario "irregular-process" (300 samples
at irregular times, process noise proportional to each channel's spread), plus a
variant whose process noise enters mostly one channel and is correlated (``Q`` of
condition number about 100 after scaling the channels by their spreads), where
weighting the channels by their spreads alone is far from the likelihood's
weighting.  For each weighting of :class:`fitdyn.estimators.prediction.PredictionEstimator`
the table gives the root-mean-square error of the trace, the determinant and the
matrix (Frobenius norm), relative to ``max |lambda|`` (``max |lambda|^2`` for the
determinant), the median point-fit time, and failures.

Usage::

    python benchmarks/prediction_weighting.py              # 200 datasets per noise
    python benchmarks/prediction_weighting.py --datasets 50
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from coverage import _dataset  # noqa: E402

from fitdyn import linalg2  # noqa: E402
from fitdyn.errors import FitdynError  # noqa: E402
from fitdyn.estimators import get_estimator  # noqa: E402
from fitdyn.simulate import simulate  # noqa: E402


def _skewed(index: int, seed: int):
    """The same truths and times, process noise mostly in one correlated direction."""
    A, rec = _dataset("irregular-process", index, seed)
    rng = np.random.default_rng([seed, index, 99])
    lam = linalg2.eigvals(A[None])[0]
    rho = float(np.max(np.abs(lam)))
    clean = simulate(A, None, rec.values[0], rec.times)
    sd = clean.values.std(axis=0)
    u = np.array([0.3, 1.0]) / np.hypot(0.3, 1.0)
    D = np.diag(sd)
    Q = D @ ((0.04 * np.outer(u, u) + 0.0004 * np.eye(2)) * rho) @ D
    xs = rng.normal(0, 2.0, 2)
    out = simulate(A, xs, rec.values[0] + xs, rec.times, process_noise=Q, seed=rng)
    return A, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--datasets", type=int, default=200)
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args()
    print(f"prediction-error fit, {args.datasets} datasets per noise; RMSE relative to "
          "max|lambda| (det: max|lambda|^2)")  # fmt: skip
    head = (f"{'noise':<22}{'weighting':<11}{'trace':>9}{'det':>9}{'matrix':>9}{'ms':>7}"
            f"{'failed':>8}")  # fmt: skip
    print(head)
    print("-" * len(head))
    for label, make in (("as in coverage.py", lambda i: _dataset("irregular-process", i,
                                                                 args.seed)),
                        ("one correlated dir.", lambda i: _skewed(i, args.seed))):  # fmt: skip
        data = [make(i) for i in range(args.datasets)]
        for weighting in ("step", "noise"):
            est = get_estimator("prediction", weighting=weighting)
            errs, times, failed = [], [], 0
            for A, rec in data:
                rho = float(np.max(np.abs(linalg2.eigvals(A[None])[0])))
                t0 = time.perf_counter()
                try:
                    e = est.fit(rec)
                except FitdynError:
                    failed += 1
                    continue
                times.append(time.perf_counter() - t0)
                tr, det, _ = linalg2.invariants(np.stack([e.matrix, A]))
                errs.append(
                    [
                        (tr[0] - tr[1]) / rho,
                        (det[0] - det[1]) / rho**2,
                        np.linalg.norm(e.matrix - A) / rho,
                    ]
                )
            E = np.array(errs)
            rmse = np.sqrt(np.mean(E**2, axis=0))
            print(f"{label:<22}{weighting:<11}{rmse[0]:>9.4f}{rmse[1]:>9.4f}{rmse[2]:>9.4f}"
                  f"{1000 * np.median(times):>7.0f}{failed:>8d}")  # fmt: skip


if __name__ == "__main__":
    main()
