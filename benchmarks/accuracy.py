"""Accuracy of the estimators on simulated recordings: eigenvalue error and class.

Every dataset is simulated exactly (``fitdyn.simulate``) from a random system of
one of the five generic classes (saddle, stable / unstable node, stable / unstable
spiral).  Conditions vary the noise (measurement or process, several levels), the
sampling (uniform or irregular) and the number of trajectories.  For each
estimator the table gives

* the median relative eigenvalue error: per dataset the larger of
  ``|lambda_hat_k - lambda_k| / |lambda_k|`` over the two eigenvalues, both sorted
  by :func:`fitdyn.linalg2.sort_eigenvalues`, then the median over datasets (%);
* the class accuracy: how often the point label with ``rtol = 0`` (generic classes
  only) matches the true class (%).

A fit that fails or refuses counts as an infinite error and a wrong class; the
number of such datasets is shown in brackets ("refused" when all of them did, as
the discrete fit does on irregular steps).  The last column says what ``auto``
chose.

Columns: ``derivative`` is the default derivative regression (Savitzky-Golay on
uniform, local polynomial fits on irregular steps, smoothed states as regressors),
``derivative-raw`` the same with the raw samples as regressors (the
errors-in-variables comparison), ``derivative-spline`` the GCV smoothing spline.

Definitions
-----------
signal sd
    Per channel, the standard deviation of the noise-free samples of all
    trajectories of the dataset.
measurement noise p %
    Independent Gaussian errors with sd ``p / 100 * signal sd`` per channel.
process noise p %
    Diffusion ``Q = diag(q_j)`` with ``q_j = (p / 100 * signal sd_j)^2 * rho``,
    ``rho = max |lambda|``: over one characteristic time ``1 / rho`` the
    disturbances alone accumulate an sd of ``p %`` of the signal sd.
naive
    ``numpy.gradient`` of the raw samples per trajectory, then least squares of the
    derivatives on ``[x, 1]``.

Systems and experiments (random per dataset, seeded): eigenvalues drawn in fixed
ranges per class (nodes with an eigenvalue ratio 2.5-5, spirals with
``|Re| / |Im|`` 0.1-0.3 (stable) or 0.05-0.15 (unstable)), eigenvectors from a
random rotation and shear, equilibria away from the origin, and starting states
that excite both modes (a saddle starts near its stable manifold and leaves along
the unstable one).  Record lengths span about three slowest time constants or
periods.  One trajectory has 200 samples; five trajectories have 40 each (the same
total), except in the "5 traj x 200" row (a long record: 1000 samples).  Irregular
times are sorted uniform random draws over the same span.

These are simulations of the linear model itself: they show how the estimators
behave when the model is right, not how a real system will behave.

Usage::

    python benchmarks/accuracy.py            # default run (a few minutes on 2 cores)
    python benchmarks/accuracy.py --quick    # a small run
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import numpy as np  # noqa: E402

CLASSES = ("saddle", "stable node", "unstable node", "stable spiral", "unstable spiral")
METHODS = (
    "naive",
    "derivative",
    "derivative-raw",
    "derivative-spline",
    "integral",
    "discrete",
    "instrumental",
    "nonlinear-iv",
    "prediction",
    "kalman",
    "trajectory",
    "auto",
)


@dataclass(frozen=True)
class Condition:
    """One row of the table."""

    label: str
    measurement: float = 0.0  # percent of signal sd
    process: float = 0.0  # percent, see module notes
    irregular: bool = False
    trajectories: int = 1
    samples: int = 200  # total


CONDITIONS: tuple[Condition, ...] = (
    Condition("meas 1 %, uniform, 1 traj", measurement=1),
    Condition("meas 5 %, uniform, 1 traj", measurement=5),
    Condition("meas 10 %, uniform, 1 traj", measurement=10),
    Condition("meas 5 %, irregular, 1 traj", measurement=5, irregular=True),
    Condition("meas 5 %, uniform, 5 traj", measurement=5, trajectories=5),
    Condition("meas 5 %, irregular, 5 traj", measurement=5, irregular=True, trajectories=5),
    Condition("proc 5 %, uniform, 1 traj", process=5),
    Condition("proc 20 %, uniform, 1 traj", process=20),
    Condition("proc 20 %, irregular, 1 traj", process=20, irregular=True),
    Condition("proc 20 %, uniform, 5 traj", process=20, trajectories=5),
    Condition("proc 20 %, uniform, 5 traj x 200", process=20, trajectories=5, samples=1000),
    Condition("proc 10 % + meas 2 %, uniform, 1 traj", measurement=2, process=10),
    Condition("proc 20 % + meas 5 %, uniform, 1 traj, 500", measurement=5, process=20, samples=500),
    Condition(
        "proc 20 % + meas 5 %, irregular, 1 traj, 500",
        measurement=5,
        process=20,
        irregular=True,
        samples=500,
    ),
)

TARGET = CONDITIONS[1]


# ----------------------------------------------------------------------------------
# systems
# ----------------------------------------------------------------------------------
def _basis(rng: np.random.Generator) -> np.ndarray:
    th = rng.uniform(0, np.pi)
    rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    shear = np.array([[1.0, rng.uniform(-0.5, 0.5)], [0.0, 1.0]])
    return rot @ shear


def make_system(cls: str, rng: np.random.Generator):
    """(A, modes P, eigenvalues, record length, starting-state factory)."""
    P = _basis(rng)
    Pinv = np.linalg.inv(P)
    if cls in ("stable node", "unstable node", "saddle"):
        if cls == "saddle":
            lu = rng.uniform(0.3, 0.8)
            ls = -lu * rng.uniform(1.0, 2.5)
            lam = np.array([lu, ls])
        else:
            slow = rng.uniform(0.2, 0.5)
            fast = slow * rng.uniform(2.5, 5.0)
            sign = -1.0 if cls == "stable node" else 1.0
            lam = sign * np.array([slow, fast])
        A = P @ np.diag(lam) @ Pinv
        if cls == "saddle":
            c_u = rng.uniform(0.02, 0.08)
            T = (np.log(1.0 / c_u) + 1.0) / lam[0]

            def start(r):
                return P @ np.array(
                    [
                        c_u * r.choice([-1, 1]) * r.uniform(0.5, 1.5),
                        r.choice([-1, 1]) * r.uniform(0.7, 1.3),
                    ]
                )
        elif cls == "stable node":
            T = 3.0 / abs(lam[0])

            def start(r):
                return P @ (r.choice([-1, 1], 2) * r.uniform(0.6, 1.4, 2))
        else:
            # the fast mode starts small and overtakes the slow one near the end
            T = 3.0 / lam[1] + 1.0 / lam[0]
            c_f = float(np.exp(-lam[1] * T + lam[0] * T))

            def start(r):
                return P @ np.array(
                    [
                        r.choice([-1, 1]) * r.uniform(0.7, 1.3),
                        c_f * r.choice([-1, 1]) * r.uniform(0.5, 2.0),
                    ]
                )
    else:
        w = rng.uniform(0.8, 1.5)
        if cls == "stable spiral":
            s = -w * rng.uniform(0.1, 0.3)
            T = min(3 * 2 * np.pi / w, 3.0 / abs(s))
        else:
            s = w * rng.uniform(0.05, 0.15)
            T = min(3 * 2 * np.pi / w, 2.5 / s)
        A = P @ np.array([[s, w], [-w, s]]) @ Pinv
        lam = np.array([s + 1j * w, s - 1j * w])

        def start(r):
            phi = r.uniform(0, 2 * np.pi)
            return P @ (r.uniform(0.7, 1.3) * np.array([np.cos(phi), np.sin(phi)]))

    return A, lam, float(T), start


def make_dataset(cls: str, cond: Condition, seed: int):
    """A simulated Recording and its true matrix."""
    from fitdyn.simulate import simulate

    rng = np.random.default_rng(seed)
    A, lam, T, start = make_system(cls, rng)
    xs = rng.normal(0.0, 3.0, 2) + np.array([10.0, -5.0])
    R = cond.trajectories
    per = cond.samples // R
    x0 = np.array([xs + start(rng) for _ in range(R)])
    if cond.irregular:
        times = [np.sort(np.concatenate([[0.0], rng.uniform(0, T, per - 1)])) for _ in range(R)]
    else:
        times = [np.linspace(0.0, T, per)] * R
    clean = simulate(A, xs, x0, times)
    sig = clean.values.std(axis=0)
    rho = float(np.max(np.abs(lam)))
    Q = np.diag((cond.process / 100 * sig) ** 2 * rho) if cond.process else None
    meas = cond.measurement / 100 * sig if cond.measurement else None
    noise_seed = int(rng.integers(2**32))
    rec = simulate(A, xs, x0, times, process_noise=Q, measurement_noise=meas, seed=noise_seed)
    return rec, A


# ----------------------------------------------------------------------------------
# estimators
# ----------------------------------------------------------------------------------
def naive_fit(rec) -> np.ndarray:
    """numpy.gradient per trajectory + least squares on [x, 1]."""
    D = np.zeros_like(rec.values)
    for k in range(rec.n_trajectories):
        m = rec.trajectory == k
        D[m] = np.gradient(rec.values[m], rec.times[m], axis=0)
    X = np.column_stack([rec.values, np.ones(rec.n_samples)])
    C, *_ = np.linalg.lstsq(X, D, rcond=None)
    return C[:2].T


def run_method(method: str, rec) -> tuple[np.ndarray | None, str | None]:
    """(A or None, chosen method for auto)."""
    from fitdyn.errors import FitdynError
    from fitdyn.estimators import estimate, get_estimator

    try:
        if method == "naive":
            return naive_fit(rec), None
        if method == "derivative-raw":
            return get_estimator("derivative", smooth_states=False).fit(rec).matrix, None
        if method == "derivative-spline":
            return get_estimator("derivative", derivative="spline").fit(rec).matrix, None
        if method == "auto":
            est, _ = estimate(rec, "auto")
            return est.matrix, est.method
        est = get_estimator(method).fit(rec)
        return est.matrix, None
    except (FitdynError, ImportError, np.linalg.LinAlgError):
        return None, None


def score(A_hat: np.ndarray | None, A: np.ndarray) -> tuple[float, bool]:
    from fitdyn import linalg2
    from fitdyn.classify import classify

    if A_hat is None or not np.all(np.isfinite(A_hat)):
        return float("inf"), False
    lam = linalg2.sort_eigenvalues(np.linalg.eigvals(A))
    lam_hat = linalg2.eigvals(A_hat)
    err = float(np.max(np.abs(lam_hat - lam) / np.abs(lam)))
    return err, classify(A_hat, rtol=0)[0] == classify(A, rtol=0)[0]


def one_job(job: tuple[int, int, int, tuple[str, ...]]):
    ci, k, seed, methods = job
    cond = CONDITIONS[ci]
    cls = CLASSES[k % len(CLASSES)]
    rec, A = make_dataset(cls, cond, seed)
    out = {}
    for m in methods:
        A_hat, chosen = run_method(m, rec)
        out[m] = (*score(A_hat, A), chosen)
    return ci, cls, out


# ----------------------------------------------------------------------------------
# table
# ----------------------------------------------------------------------------------
def summarise(rows: list[tuple[float, bool, str | None]]) -> str:
    errs = np.array([r[0] for r in rows])
    acc = np.mean([r[1] for r in rows])
    fails = int(np.sum(~np.isfinite(errs)))
    if fails == len(rows):
        return "refused"
    med = float(np.median(errs))
    cell = f"{100 * med:.1f} / {100 * acc:.0f}" if np.isfinite(med) else f"fail / {100 * acc:.0f}"
    return cell + (f" [{fails}]" if fails else "")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="3 datasets per class and row")
    parser.add_argument("--per-class", type=int, default=None, help="datasets per class and row")
    parser.add_argument("--seed", type=int, default=20240611)
    parser.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    parser.add_argument("--methods", default=",".join(METHODS))
    parser.add_argument("--rows", default=None, help="comma-separated row numbers (0-based) to run")
    args = parser.parse_args(argv)
    per_class = args.per_class or (3 if args.quick else 12)
    methods = tuple(m for m in args.methods.split(",") if m)
    have_discrete = True
    try:
        import fitdyn.estimators.discrete  # noqa: F401
    except ImportError:
        have_discrete = False
        methods = tuple(m for m in methods if m != "discrete")

    seeds = np.random.SeedSequence(args.seed)
    jobs = []
    rows = [int(r) for r in args.rows.split(",")] if args.rows else list(range(len(CONDITIONS)))
    children = seeds.spawn(len(CONDITIONS))
    for ci in rows:
        child = children[ci]
        ss = child.generate_state(per_class * len(CLASSES))
        for k in range(per_class * len(CLASSES)):
            jobs.append((ci, k, int(ss[k]), methods))
    t0 = time.perf_counter()
    if args.workers > 1:
        with ProcessPoolExecutor(args.workers) as pool:
            results = list(pool.map(one_job, jobs, chunksize=4))
    else:
        results = [one_job(j) for j in jobs]
    elapsed = time.perf_counter() - t0

    by_cond: dict[int, dict[str, list]] = {}
    by_class: dict[str, dict[str, list]] = {}
    chosen: dict[int, dict[str, int]] = {}
    target_index = CONDITIONS.index(TARGET)
    for ci, cls, out in results:
        for m, r in out.items():
            by_cond.setdefault(ci, {}).setdefault(m, []).append(r)
            if ci == target_index:
                by_class.setdefault(cls, {}).setdefault(m, []).append(r)
            if m == "auto" and r[2]:
                chosen.setdefault(ci, {}).setdefault(r[2], 0)
                chosen[ci][r[2]] += 1

    n_per = per_class * len(CLASSES)
    print(
        f"Median relative eigenvalue error (%) / class accuracy (%), {n_per} datasets per row "
        f"({per_class} per class), seed {args.seed}; [n] = failed or refused fits.\n"
    )
    print("| condition | " + " | ".join(methods) + " | auto chose |")
    print("|---|" + "---|" * (len(methods) + 1))
    for ci, cond in enumerate(CONDITIONS):
        if ci not in by_cond:
            continue
        cells = [summarise(by_cond[ci][m]) for m in methods]
        ch = ", ".join(f"{k} {v}" for k, v in sorted(chosen.get(ci, {}).items()))
        print(f"| {cond.label} | " + " | ".join(cells) + f" | {ch} |")
    if by_class:
        print(f"\nPer class, {TARGET.label} ({TARGET.samples} samples):\n")
        print("| class | " + " | ".join(methods) + " |")
        print("|---|" + "---|" * len(methods))
        for cls in CLASSES:
            cells = [summarise(by_class[cls][m]) for m in methods]
            print(f"| {cls} | " + " | ".join(cells) + " |")
    if "auto" in methods and "naive" in methods and target_index in by_cond:
        t = by_cond[target_index]
        med_auto = float(np.median([r[0] for r in t["auto"]]))
        med_naive = float(np.median([r[0] for r in t["naive"]]))
        acc_auto = float(np.mean([r[1] for r in t["auto"]]))
        print(
            f"\nTarget row: auto median error {100 * med_auto:.2f} % (goal <= 5 %), "
            f"{med_naive / med_auto:.1f}x lower than naive (goal >= 3x), "
            f"class accuracy {100 * acc_auto:.0f} % (goal >= 95 %)."
        )
    if not have_discrete:
        print("\n(discrete estimator not available: column left out)")
    print(f"\n{len(jobs)} datasets in {elapsed:.0f} s with {args.workers} worker(s).")
    return 0


if __name__ == "__main__":
    sys.exit(main())
