"""Speed and memory of the output-error (trajectory) fit and its parametric bootstrap.

Workload: one 200-sample uniform recording with 3 % measurement noise (noise sd 3 %
of each channel's spread) of each of a stable spiral, a saddle and a stable node
(drawn as in ``benchmarks/accuracy.py``), and the parametric bootstrap of the
trajectory fit with 1,000 replicates.  Measured in the same run:

* batched: :func:`fitdyn.bootstrap.bootstrap` with the trajectory fit (one batched
  Levenberg-Marquardt solve over all replicates) -- wall and CPU time (best of three
  runs) and peak memory (tracemalloc peak of Python/numpy allocations, in a fourth);
* lmfit path: the same bootstrap with the previous per-replicate lmfit fit
  (``benchmarks/legacy_trajectory.py``), timed on a few replicates and scaled to
  1,000 (it takes minutes at full size);
* loop: a per-replicate loop of ``numpy.linalg.lstsq`` (the one-step regression),
  ``scipy.linalg.logm`` and ``numpy.linalg.eigvals`` on pre-simulated replicates,
  timed on a few hundred and scaled to 1,000 (best of three runs, as the batched
  figure);
* auto point fit: ``fitdyn.fit(rec)`` (no bootstrap), CPU time, median of five;
* slowest recording: ``fitdyn.fit(rec, bootstrap=1000)`` (what ``auto`` does, its
  diagnostic output-error fit included) on the first datasets of every scenario of
  the coverage benchmark and of every condition of the accuracy benchmark (every
  class), whichever estimator ``auto`` chooses;
* auto point fits: ``fitdyn.fit(rec)`` on recordings of every condition and class of
  the accuracy benchmark (process noise included, where the diagnostic
  output-error fit runs and is rejected), median and slowest.

Times are wall-clock and CPU seconds (CPU is the fairer figure on a shared machine).

Targets (issue 12): at least 30x faster than the lmfit path; each replicate cheaper
than one iteration of the loop; auto point fit at most 50 ms for 200 samples; no
recording over 2 s for 1,000 replicates.

Usage::

    python benchmarks/trajectory_speed.py            # 1,000 replicates, lmfit on 20
    python benchmarks/trajectory_speed.py --quick    # 1,000 replicates, lmfit on 5,
                                                     # fewer slowest-recording datasets
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import tracemalloc

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import scipy.linalg  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import accuracy  # noqa: E402
import coverage  # noqa: E402
from legacy_trajectory import LmfitTrajectoryEstimator  # noqa: E402

import fitdyn  # noqa: E402
from fitdyn.bootstrap import bootstrap  # noqa: E402
from fitdyn.errors import FitdynError  # noqa: E402
from fitdyn.estimators.trajectory import TrajectoryEstimator  # noqa: E402

CLASSES = ("stable spiral", "saddle", "stable node")
NOISE = accuracy.Condition("meas 3 %, uniform, 1 traj", measurement=3)


def _recording(cls: str, seed: int):
    rec, A = accuracy.make_dataset(cls, NOISE, seed)
    return rec, A


def _loop(rec, V: np.ndarray) -> tuple[float, float]:
    """Wall and CPU seconds of the per-replicate lstsq + logm + eigvals loop over ``V``."""
    h = float(np.median(np.diff(rec.times)))
    t0 = time.perf_counter()
    c0 = time.process_time()
    for v in V:
        Z = np.column_stack([v[:-1], np.ones(v.shape[0] - 1)])
        C, *_ = np.linalg.lstsq(Z, v[1:], rcond=None)
        F = C[:2].T
        A = scipy.linalg.logm(F) / h
        np.linalg.eigvals(np.real(A))
    return time.perf_counter() - t0, time.process_time() - c0


def _replicates(rec, est, B: int, seed: int) -> np.ndarray:
    """Replicate values: the fitted trajectory plus Gaussian noise of the residual sd."""
    rng = np.random.default_rng(seed)
    model = rec.values - est.residuals
    sd = est.residuals.std(axis=0)
    return model[None] + sd * rng.standard_normal((B, *rec.values.shape))


def speed_rows(replicates: int, old_reps: int, loop_reps: int, seed: int) -> list[str]:
    rows = []
    for k, cls in enumerate(CLASSES):
        rec, _ = _recording(cls, seed + k)
        # auto point fit (median of five; the first call also warms caches)
        fitdyn.fit(rec, bootstrap=0, quiet=True)
        times = []
        for _ in range(5):
            c0 = time.process_time()
            f = fitdyn.fit(rec, bootstrap=0, quiet=True)
            times.append(time.process_time() - c0)
        auto_ms = 1e3 * float(np.median(times))
        # batched
        new = TrajectoryEstimator()
        e_new = new.fit(rec)
        tracemalloc.start()
        t0 = time.perf_counter()
        c0 = time.process_time()
        u = bootstrap(rec, new, e_new, replicates=replicates, seed=seed, quiet=True)
        t_new, c_new = time.perf_counter() - t0, time.process_time() - c0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        # CPU time without tracemalloc's overhead (best of three)
        for _ in range(3):
            t0 = time.perf_counter()
            c0 = time.process_time()
            bootstrap(rec, new, e_new, replicates=replicates, seed=seed, quiet=True)
            t_new = min(t_new, time.perf_counter() - t0)
            c_new = min(c_new, time.process_time() - c0)
        # lmfit path, on a few replicates
        old = LmfitTrajectoryEstimator()
        e_old = old.fit(rec)
        t0 = time.perf_counter()
        c0 = time.process_time()
        bootstrap(rec, old, e_old, replicates=old_reps, seed=seed, quiet=True)
        t_old = (time.perf_counter() - t0) * replicates / old_reps
        c_old = (time.process_time() - c0) * replicates / old_reps
        # loop of the three library calls
        V = _replicates(rec, e_new, loop_reps, seed)
        # best of three, as for the batched figure (the machine is shared)
        runs = [_loop(rec, V) for _ in range(3)]
        t_loop = min(r[0] for r in runs) * replicates / loop_reps
        c_loop = min(r[1] for r in runs) * replicates / loop_reps
        rows.append(
            f"| {cls} ({f.estimate.method}) | {auto_ms:.0f} | {t_new:.2f} / {c_new:.2f} | "
            f"{peak / 2**20:.0f} | {u.failed_replicates} | {t_old:.0f} / {c_old:.0f} | "
            f"{c_old / c_new:.0f}x | {t_loop:.2f} / {c_loop:.2f} | "
            f"{1e3 * c_new / replicates:.2f} / {1e3 * c_loop / replicates:.2f} |"
        )
        print(rows[-1], file=sys.stderr, flush=True)
    return rows


def slowest_rows(datasets: int, replicates: int, seed: int) -> list[str]:
    rows = []
    groups: list[tuple[str, list]] = []
    # every scenario of the coverage benchmark and every condition of the accuracy
    # benchmark (the target: no recording of theirs over 2 s for 1,000 replicates)
    for scen in coverage.CONFIGS:
        groups.append(
            (
                f"coverage '{scen}'",
                [coverage._dataset(scen, i, 2024)[1] for i in range(datasets)],
            )
        )
    for cond in accuracy.CONDITIONS:
        recs = []
        for i in range(datasets):
            cls = accuracy.CLASSES[i % len(accuracy.CLASSES)]
            recs.append(accuracy.make_dataset(cls, cond, 1000 * i + 7)[0])
        groups.append((f"accuracy '{cond.label}'", recs))
    for label, recs in groups:
        times, cpu = [], []
        chosen: dict[str, int] = {}
        for j, rec in enumerate(recs):
            t0 = time.perf_counter()
            c0 = time.process_time()
            try:
                f = fitdyn.fit(rec, bootstrap=replicates, seed=seed + j, quiet=True)
                name = f.estimate.method
            except FitdynError:
                name = "failed"
            times.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
            chosen[name] = chosen.get(name, 0) + 1
        how = ", ".join(f"{k} {v}" for k, v in sorted(chosen.items()))
        rows.append(
            f"| {label} | {len(recs)} | {how} | {np.median(times):.2f} / {np.median(cpu):.2f} "
            f"| {max(times):.2f} / {max(cpu):.2f} |"
        )
        print(rows[-1], file=sys.stderr, flush=True)
    return rows


def auto_rows(per_class: int, seed: int) -> list[str]:
    """``fitdyn.fit(rec)`` (auto, no bootstrap) on every condition of the accuracy
    benchmark: the diagnostic output-error fit runs on all of them that do not show
    process noise beyond doubt, including diverging saddles and unstable nodes."""
    rows = []
    for cond in accuracy.CONDITIONS:
        times = []
        worst = ("", 0.0)
        for cls in accuracy.CLASSES:
            for i in range(per_class):
                rec = accuracy.make_dataset(cls, cond, seed + 1000 * i + 11)[0]
                c0 = time.process_time()
                try:
                    fitdyn.fit(rec, bootstrap=0, quiet=True)
                except FitdynError:
                    pass
                dt = time.process_time() - c0
                times.append(dt)
                if dt > worst[1]:
                    worst = (cls, dt)
        rows.append(
            f"| {cond.label} | {len(times)} | {1e3 * np.median(times):.0f} | "
            f"{1e3 * worst[1]:.0f} ({worst[0]}) |"
        )
        print(rows[-1], file=sys.stderr, flush=True)
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="lmfit on 5 replicates, 3 datasets")
    ap.add_argument("--replicates", type=int, default=1000)
    ap.add_argument("--lmfit-replicates", type=int, default=None)
    ap.add_argument("--loop-replicates", type=int, default=300)
    ap.add_argument("--datasets", type=int, default=None, help="per slowest-recording group")
    ap.add_argument("--seed", type=int, default=12)
    args = ap.parse_args()
    old_reps = args.lmfit_replicates or (5 if args.quick else 20)
    datasets = args.datasets or (3 if args.quick else 10)
    t0 = time.perf_counter()
    rows = speed_rows(args.replicates, old_reps, args.loop_replicates, args.seed)
    print(
        f"\n### Trajectory fit, {args.replicates} bootstrap replicates of a 200-sample "
        "recording, 3 % measurement noise\n"
    )
    print(
        "| recording (auto chose) | auto point fit CPU ms | batched s, wall / CPU | peak MB | "
        f"failed | lmfit path s, wall / CPU (from {old_reps}) | speed-up (CPU) | loop s, "
        f"wall / CPU (from {args.loop_replicates}) | CPU ms per replicate: batched / loop |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    print("\n".join(rows))
    slow = slowest_rows(datasets, args.replicates, args.seed)
    print(f"\n### `fitdyn.fit(rec, bootstrap={args.replicates})` per recording\n")
    print("| datasets | n | auto chose | median s, wall / CPU | slowest s, wall / CPU |")
    print("|---|---|---|---|---|")
    print("\n".join(slow))
    auto = auto_rows(2 if args.quick else 4, args.seed)
    print("\n### `fitdyn.fit(rec)` (auto, no bootstrap) on the accuracy benchmark's recordings\n")
    print("| condition | recordings | median CPU ms | slowest CPU ms (class) |")
    print("|---|---|---|---|")
    print("\n".join(auto))
    print(f"\n(total {time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
