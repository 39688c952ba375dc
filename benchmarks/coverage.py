"""Coverage of the bootstrap intervals and calibration of P(stable), by simulation.

For each scenario, many datasets are simulated exactly (``fitdyn.simulate``) from a
random true system; each dataset is fitted and bootstrapped with one or more
(estimator, scheme, bias correction) configurations.  The tables give

* coverage: the fraction of datasets whose nominal 95 % interval for the trace,
  the determinant and the largest real part contains the true value (target
  0.93-0.97; with N datasets the Monte Carlo standard error is about
  ``sqrt(0.95 * 0.05 / N)``, 0.013 for N = 300);
* the median interval width of the largest real part, relative to
  ``max |lambda|`` (sharper is better, once calibrated);
* the Brier score of P(stable) against the true verdict, and a reliability table
  over all scenarios: datasets binned by P(stable), the fraction truly stable in
  each bin.  The truths are drawn from a prior of our own, so calibration is
  relative to that prior.

Scenarios (truth per dataset, seeded):

short
    50 uniform samples, process noise; stable nodes and spirals.
irregular
    150 samples at irregular times, measurement noise 5 %.
irregular-process
    300 samples at irregular times, process noise.
irregular-mixed
    300 samples at irregular times, process and measurement noise as in "mixed"
    (the innovation over the mean step).
process
    300 uniform samples, process noise.
measurement
    200 uniform samples, measurement noise 5 %.
trajectories
    6 trajectories of 40 uniform samples, process noise.
mixed
    300 uniform samples, process noise and measurement noise together, the
    measurement sd twice the sd of the one-step process innovation
    ``sqrt(Q_jj h)`` (the regime where least squares on the samples is
    attenuated).
near-center
    300 uniform samples of a spiral whose real part is drawn in [-0.04, 0.04] times
    the frequency (half the truths unstable), process noise.

Noise (as in benchmarks/accuracy.py): measurement noise p % has sd ``p / 100`` of
the per-channel sd of the noise-free samples; process noise p % is the diffusion
``Q = diag((p / 100 * signal sd_j)^2 * rho)``, ``rho = max |lambda|``.  Process
noise here is 20 %.  Failed fits count as non-covering.

These are simulations of the linear model itself: they show how the schemes behave
when the model is right, not how a real system will behave.

Usage::

    python benchmarks/coverage.py            # 300 datasets per scenario
    python benchmarks/coverage.py --quick    # 60 datasets per scenario
    python benchmarks/coverage.py --datasets 100 --replicates 300 --only short,process
    python benchmarks/coverage.py --methods auto            # only what fit() does
    python benchmarks/coverage.py --methods discrete,integral --skip-auto
"""

from __future__ import annotations

import argparse
import os
import time
import zlib
from collections import Counter, defaultdict
from multiprocessing import get_context

import numpy as np

from fitdyn import linalg2
from fitdyn.bootstrap import bootstrap
from fitdyn.errors import FitdynError
from fitdyn.estimators import estimate, get_estimator
from fitdyn.simulate import simulate

# (estimator, scheme, bias correction) configurations per scenario; every scenario
# also runs ("auto", "auto", None) first: what fit() does by default
_LISTED: dict[str, list[tuple[str, str, bool]]] = {
    "short": [
        ("discrete", "residual", True),
        ("discrete", "residual", False),
        ("discrete", "parametric", True),
    ],
    "irregular": [
        ("trajectory", "parametric", False),
        ("integral", "blocks", False),
    ],
    "irregular-process": [
        ("prediction", "parametric", True),
        ("prediction", "parametric", False),
        ("derivative", "blocks", False),
        ("integral", "blocks", False),
        ("derivative", "parametric", False),
    ],
    "irregular-mixed": [
        ("nonlinear-iv", "parametric", True),
        ("nonlinear-iv", "parametric", False),
        ("derivative", "blocks", False),
        ("prediction", "parametric", True),
        ("integral", "blocks", False),
    ],
    "process": [
        ("discrete", "residual", True),
        ("discrete", "residual", False),
        ("integral", "blocks", False),
    ],
    "measurement": [
        ("trajectory", "parametric", False),
        ("integral", "blocks", False),
        ("discrete", "residual", True),
    ],
    "trajectories": [
        ("discrete", "residual", True),
        ("discrete", "cases", False),
    ],
    "mixed": [
        ("instrumental", "parametric", True),
        ("instrumental", "blocks", False),
        ("instrumental", "parametric", False),
        ("derivative", "blocks", False),
        ("discrete", "residual", True),
        ("kalman", "parametric", True),
    ],
    "near-center": [
        ("discrete", "residual", True),
        ("discrete", "residual", False),
        ("discrete", "parametric", True),
    ],
}

CONFIGS: dict[str, list[tuple[str, str, bool | None]]] = {
    name: [("auto", "auto", None), *rows] for name, rows in _LISTED.items()
}

#: replicates per dataset for the Kalman-filter fit (seconds per bootstrap; the
#: output-error trajectory fit, batched since, gets the full --replicates)
SLOW_REPLICATES = 150
#: datasets per scenario for estimators too slow for all of them (seconds per
#: bootstrap): only the first this many datasets run them
SLOW_DATASETS = {"kalman": 100}  # the trajectory fit runs on all datasets

PROCESS_PCT = 20.0
MEASURE_PCT = 5.0
#: in the "mixed" scenario: measurement sd / sd of the one-step process innovation
MIXED_RATIO = 2.0


def _rotation(rng: np.random.Generator) -> np.ndarray:
    a = rng.uniform(0, np.pi)
    c, s = np.cos(a), np.sin(a)
    shear = np.array([[1.0, rng.uniform(-0.5, 0.5)], [0.0, 1.0]])
    return np.array([[c, -s], [s, c]]) @ shear


def _truth(scenario: str, rng: np.random.Generator) -> np.ndarray:
    """A random true matrix with max |lambda| about 1."""
    if scenario == "near-center":
        w = 1.0
        re = rng.uniform(-0.04, 0.04) * w
        J = np.array([[re, w], [-w, re]])
    elif rng.random() < 0.5:  # stable node
        l1 = -rng.uniform(0.15, 0.3)
        J = np.diag([l1, l1 * rng.uniform(2.5, 5.0)])
    else:  # stable spiral
        w = 1.0
        J = np.array([[-w * rng.uniform(0.1, 0.3), w], [-w, 0.0]])
        J[1, 1] = J[0, 0]
    P = _rotation(rng)
    return P @ J @ np.linalg.inv(P)


def _dataset(scenario: str, index: int, seed: int):
    # zlib.crc32, not hash(): str hashes change between processes
    rng = np.random.default_rng([seed, index, zlib.crc32(scenario.encode())])
    A = _truth(scenario, rng)
    lam = linalg2.eigvals(A[None])[0]
    rho = float(np.max(np.abs(lam)))
    slow = float(np.min(np.abs(lam.real)))
    xs = rng.normal(0, 2.0, 2)
    traj = 6 if scenario == "trajectories" else 1
    n = {"short": 50, "irregular": 150, "irregular-process": 300, "irregular-mixed": 300,
         "process": 300,
         "measurement": 200, "trajectories": 40, "near-center": 300,
         "mixed": 300}[scenario]  # fmt: skip
    # span: about three slow time constants (spirals: at least three periods)
    span = 3.0 / max(slow, 0.05)
    if np.any(lam.imag != 0):
        span = max(span, 3 * 2 * np.pi / rho)
    span = min(span, 60.0)
    if scenario in ("short", "trajectories"):
        span = min(span, 25.0)
    if scenario in ("irregular", "irregular-process", "irregular-mixed"):
        t = np.sort(rng.uniform(0, span, n))
        t[0] = 0.0
    else:
        t = np.arange(n) * span / n
    x0 = xs + rng.normal(0, 3.0, (traj, 2))
    clean = simulate(A, xs, x0, t, trajectories=traj)
    sd = clean.values.std(axis=0)
    process = scenario in (
        "short", "process", "trajectories", "near-center", "mixed", "irregular-process",
        "irregular-mixed",
    )  # fmt: skip
    Q = np.diag((PROCESS_PCT / 100 * sd) ** 2 * rho) if process else None
    meas = MEASURE_PCT / 100 * sd if scenario in ("irregular", "measurement") else None
    if scenario in ("mixed", "irregular-mixed"):  # sensor noise twice the innovation
        assert Q is not None  # over the mean step
        meas = MIXED_RATIO * np.sqrt(np.diag(Q) * (t[-1] - t[0]) / (t.size - 1))
    rec = simulate(A, xs, x0, t, process_noise=Q, measurement_noise=meas, trajectories=traj,
                   seed=rng)  # fmt: skip
    return A, rec


def _job(args):
    scenario, index, seed, replicates, slow_replicates = args
    A, rec = _dataset(scenario, index, seed)
    tau, det, _ = linalg2.invariants(A)
    maxre = float(linalg2.eigvals(A[None])[0].real.max())
    rho = float(np.max(np.abs(linalg2.eigvals(A[None])[0])))
    rows = []
    for k, (method, scheme, bc) in enumerate(CONFIGS[scenario]):
        row = {"config": k, "stable": maxre < 0}
        if index >= SLOW_DATASETS.get(method, index + 1):
            row["skipped"] = True
            rows.append(row)
            continue
        try:
            if method == "auto":
                e, est = estimate(rec, "auto")
                row["chosen"] = est.name
            else:
                est = get_estimator(method)
                e = est.fit(rec)
            slow = est.name == "kalman"
            reps = min(replicates, slow_replicates) if slow else replicates
            # seeded by the configuration, not its position: --methods keeps the numbers
            cfg_key = zlib.crc32(f"{method}/{scheme}/{bc}".encode())
            u = bootstrap(rec, est, e, replicates=reps, seed=[seed, index, cfg_key],
                          scheme=scheme, bias_correction=bc, quiet=True)  # fmt: skip
            iv = u.intervals
            row["trace"] = iv["trace"][0] <= tau <= iv["trace"][1]
            row["det"] = iv["determinant"][0] <= det <= iv["determinant"][1]
            row["maxre"] = iv["max_real_part"][0] <= maxre <= iv["max_real_part"][1]
            row["width"] = (iv["max_real_part"][1] - iv["max_real_part"][0]) / rho
            row["p_stable"] = u.p_stable
            row["failed"] = False
        except FitdynError:
            row.update(trace=False, det=False, maxre=False, width=np.nan, p_stable=np.nan,
                       failed=True)  # fmt: skip
        rows.append(row)
    return scenario, rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="60 datasets per scenario")
    ap.add_argument("--datasets", type=int, default=None)
    ap.add_argument("--replicates", type=int, default=250)
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--only", default=None, help="comma-separated scenarios")
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument(
        "--methods",
        default=None,
        help="comma-separated estimators: run only their rows (auto included)",
    )
    ap.add_argument(
        "--skip-auto",
        action="store_true",
        help="leave out the auto row (to rerun only comparison rows)",
    )
    ap.add_argument(
        "--slow-replicates",
        type=int,
        default=SLOW_REPLICATES,
        help="replicates for the kalman fit (capped by --replicates)",
    )
    args = ap.parse_args()
    N = args.datasets or (60 if args.quick else 300)
    scen = list(CONFIGS) if args.only is None else args.only.split(",")
    if args.methods is not None:
        keep = set(args.methods.split(","))
        for s in scen:
            CONFIGS[s] = [c for c in CONFIGS[s] if c[0] in keep or c[0] == "auto"]
    if args.skip_auto:
        for s in scen:
            CONFIGS[s] = [c for c in CONFIGS[s] if c[0] != "auto"]
    scen = [s for s in scen if CONFIGS[s]]
    jobs = [
        (s, i, args.seed, args.replicates, args.slow_replicates) for s in scen for i in range(N)
    ]
    t0 = time.perf_counter()
    results: dict[str, list[list[dict]]] = defaultdict(list)
    if args.workers > 1:
        with get_context("fork").Pool(args.workers) as pool:
            for s, rows in pool.imap_unordered(_job, jobs, chunksize=2):
                results[s].append(rows)
    else:
        for j in jobs:
            s, rows = _job(j)
            results[s].append(rows)
    wall = time.perf_counter() - t0

    print(f"coverage of nominal 95 % intervals, {N} datasets per scenario, "
          f"{args.replicates} replicates each ({args.slow_replicates} for the kalman fit, "
          f"on the first {SLOW_DATASETS['kalman']} datasets only); "
          f"{wall:.0f} s on {args.workers} workers")  # fmt: skip
    print("first row of each scenario: auto, what fit() does by default (its choices below); "
          "n: datasets")  # fmt: skip
    head = (f"{'scenario':<18}{'estimator':<14}{'scheme':<11}{'bias':<6}{'trace':>7}"
            f"{'det':>7}{'maxre':>7}{'width':>8}{'Brier':>8}{'failed':>8}{'n':>6}")  # fmt: skip
    print(head)
    print("-" * len(head))
    pooled: dict[tuple, list[tuple[float, bool]]] = defaultdict(list)
    for s in scen:
        for k, (method, scheme, bc) in enumerate(CONFIGS[s]):
            rows = [r[k] for r in results[s] if not r[k].get("skipped")]
            cov = {q: np.mean([r[q] for r in rows]) for q in ("trace", "det", "maxre")}
            width = np.nanmedian([r["width"] for r in rows])
            ps = np.array([r["p_stable"] for r in rows])
            st = np.array([r["stable"] for r in rows], dtype=float)
            ok = np.isfinite(ps)
            brier = float(np.mean((ps[ok] - st[ok]) ** 2)) if ok.any() else np.nan
            nf = sum(r["failed"] for r in rows)
            bias = "dflt" if bc is None else ("yes" if bc else "no")
            print(f"{s:<18}{method:<14}{scheme:<11}{bias:<6}"
                  f"{cov['trace']:>7.3f}{cov['det']:>7.3f}{cov['maxre']:>7.3f}"
                  f"{width:>8.3f}{brier:>8.3f}{nf:>8d}{len(rows):>6d}")  # fmt: skip
            if method == "auto":
                picks = Counter(r.get("chosen", "failed") for r in rows)
                print(f"{'':<18}  auto chose: "
                      + ", ".join(f"{m} {c}" for m, c in picks.most_common()))  # fmt: skip
                for m_, c_ in picks.most_common():
                    sub = [r for r in rows if r.get("chosen", "failed") == m_]
                    cov_m = " / ".join(f"{np.mean([r[q] for r in sub]):.3f}"
                                       for q in ("trace", "det", "maxre"))  # fmt: skip
                    print(f"{'':<18}    where it chose {m_} ({c_}): coverage {cov_m}")
            for p, y in zip(ps[ok], st[ok], strict=True):
                pooled[(method, scheme, bc)].append((p, bool(y)))

    edges = np.array([0.0, 0.05, 0.2, 0.4, 0.6, 0.8, 0.95, 1.0 + 1e-9])
    labels = [f"{edges[i]:.2f}-{min(edges[i + 1], 1):.2f}" for i in range(len(edges) - 1)]

    def table(title: str, groups: dict) -> None:
        print()
        print(title)
        print(f"{'configuration':<34}" + "".join(f"{lab:>12}" for lab in labels) + f"{'Brier':>8}")
        for key, pairs in groups.items():
            p = np.array([a for a, _ in pairs])
            y = np.array([b for _, b in pairs], dtype=float)
            cells = []
            for i in range(len(edges) - 1):
                m = (p >= edges[i]) & (p < edges[i + 1])
                cells.append(f"{y[m].mean():.2f} ({m.sum()})" if m.any() else "-")
            bias = "default" if key[-1] is None else ("bias" if key[-1] else "plain")
            name = f"{key[-3]}/{key[-2]}/{bias}"
            if len(key) == 4:
                name = f"{key[0]}: {name}"
            brier = float(np.mean((p - y) ** 2))
            print(f"{name:<34}" + "".join(f"{c:>12}" for c in cells) + f"{brier:>8.3f}")

    mixed = {}
    for s in scen:
        for k, cfg in enumerate(CONFIGS[s]):
            rows = [r[k] for r in results[s] if not r[k].get("skipped")]
            st = {r["stable"] for r in rows}
            if len(st) == 2:
                mixed[(s, *cfg)] = [
                    (r["p_stable"], r["stable"]) for r in rows if np.isfinite(r["p_stable"])
                ]
    if mixed:
        table(
            "reliability of P(stable) where the truths are both stable and unstable "
            "(fraction truly stable per bin, count)",
            mixed,
        )
    table(
        "reliability of P(stable), pooled over scenarios (prior-dependent: most truths stable)",
        pooled,
    )


if __name__ == "__main__":
    main()
