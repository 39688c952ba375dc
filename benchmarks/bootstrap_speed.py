"""Speed and memory of the batched bootstrap against a per-replicate Python loop.

Workload: 10,000 residual-bootstrap replicates (the discrete estimator's default
scheme, without bias correction) of one 1,000-sample uniform recording of a stable
spiral with process noise.  Measured in the same run:

* batched: :func:`fitdyn.bootstrap.bootstrap` -- wall time, CPU time and peak
  memory (tracemalloc peak of Python/numpy allocations, and the growth of the
  process's maximum resident set size);
* loop: what a per-replicate implementation does -- for each replicate, regenerate
  the series with a Python loop over time steps, then ``numpy.linalg.lstsq`` of the
  one-step regression, ``scipy.linalg.logm`` of F and ``numpy.linalg.eigvals`` of A.
  It is timed on a few hundred replicates and scaled to 10,000; a second figure
  ("fits only") times just the three library calls on pre-generated series, the
  most favourable case for the loop.

Target (issue 4): at least 20x faster than the loop's "fits only" figure, under 1 s
on 2 cores, peak memory under 500 MB.

Usage::

    python benchmarks/bootstrap_speed.py             # 10,000 replicates, loop on 300
    python benchmarks/bootstrap_speed.py --quick     # 2,000 replicates, loop on 50
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np
import scipy.linalg

from fitdyn.bootstrap import bootstrap
from fitdyn.estimators.discrete import DiscreteEstimator
from fitdyn.simulate import simulate

A_TRUE = np.array([[-0.5, 1.0], [-1.0, -0.3]])


def _recording(n: int):
    return simulate(A_TRUE, [1.0, 2.0], [3.0, 0.0], np.arange(n) * 0.05, process_noise=0.05,
                    seed=1)  # fmt: skip


def _loop(rec, est, e, reps: int, seed: int, generate: bool) -> float:
    """Per-replicate residual bootstrap with library calls; returns seconds."""
    F = e.extra["one_step_matrix"]
    g = e.extra["one_step_constant"]
    h = e.extra["step"]
    x = rec.values
    resid = x[1:] - x[:-1] @ F.T - g
    resid = resid - resid.mean(axis=0)
    m = resid.shape[0]
    rng = np.random.default_rng(seed)
    pre = None
    if not generate:  # pre-generate the series (not timed)
        pre = []
        for _ in range(reps):
            e_star = resid[rng.integers(0, m, m)]
            xs = np.empty_like(x)
            xs[0] = x[0]
            for k in range(m):
                xs[k + 1] = F @ xs[k] + g + e_star[k]
            pre.append(xs)
    t0 = time.perf_counter()
    ones = np.ones((m, 1))
    for r in range(reps):
        if generate:
            e_star = resid[rng.integers(0, m, m)]
            xs = np.empty_like(x)
            xs[0] = x[0]
            for k in range(m):
                xs[k + 1] = F @ xs[k] + g + e_star[k]
        else:
            xs = pre[r]
        X = np.hstack([xs[:-1], ones])
        coef = np.linalg.lstsq(X, xs[1:], rcond=None)[0]
        Fb = coef[:2].T
        Ab = scipy.linalg.logm(Fb).real / h
        np.linalg.eigvals(Ab)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--replicates", type=int, default=None)
    ap.add_argument("--loop", type=int, default=None, help="replicates timed in the loop")
    args = ap.parse_args()
    B = args.replicates or (2000 if args.quick else 10000)
    L = args.loop or (50 if args.quick else 300)
    n = 1000
    rec = _recording(n)
    est = DiscreteEstimator()
    e = est.fit(rec)
    bootstrap(rec, est, e, replicates=200, seed=0, bias_correction=False, quiet=True)  # warm-up

    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    walls, cpus = [], []
    for rep in range(3):
        c0 = time.process_time()
        t0 = time.perf_counter()
        u = bootstrap(rec, est, e, replicates=B, seed=rep, bias_correction=False, quiet=True)
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    bootstrap(rec, est, e, replicates=B, seed=0, bias_correction=False, quiet=True)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    wall = min(walls)

    t_gen = _loop(rec, est, e, L, 1, generate=True) * B / L
    t_fit = _loop(rec, est, e, L, 1, generate=False) * B / L

    print(f"bootstrap speed: {B} residual replicates of a {n}-sample recording "
          f"(discrete estimator, no bias correction)")  # fmt: skip
    print(f"{'':<34}{'seconds':>10}{'ratio':>10}")
    print(f"{'batched (best of 3, wall)':<34}{wall:>10.3f}{1.0:>10.1f}")
    print(f"{'batched (CPU time)':<34}{min(cpus):>10.3f}")
    print(f"{'loop, regenerate + fit (scaled)':<34}{t_gen:>10.1f}{t_gen / wall:>10.0f}")
    print(f"{'loop, fits only (scaled)':<34}{t_fit:>10.1f}{t_fit / wall:>10.0f}")
    print(f"peak traced memory   {peak / 2**20:8.1f} MB")
    print(f"max RSS growth       {(rss1 - rss0) / 1024:8.1f} MB  (ru_maxrss, Linux kB)")
    print(f"valid replicates     {int(u.valid.sum())} of {B}")
    print(f"loop timed on {L} replicates and scaled to {B}")


if __name__ == "__main__":
    main()
