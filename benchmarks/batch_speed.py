"""Speed and memory of the batch runner over many simulated recordings.

Workload: ``N`` simulated recordings (200 by default; 200 samples each, process and a
little measurement noise, the five generic classes in turn) written as CSV files in a
temporary folder, fitted by :func:`fitdyn.batch` without intervals and with a small
bootstrap, on 1 and 2 worker processes.  The estimator is the one-step ``discrete``
fit by default (milliseconds per file, so the figures show the runner's own cost);
``--method auto`` shows a realistic load (``auto`` runs diagnostic fits, about half a
second to two seconds per recording).

Each configuration runs in a fresh Python process, so that its figures are its own:

* wall time of the ``batch`` call (it includes starting the worker processes), and
  per recording;
* peak resident memory of the calling process (``ru_maxrss`` of itself) and of the
  largest worker (``ru_maxrss`` of its children), which shows that only the table
  rows come back;
* whether the table equals the one of the 1-worker run (it must: each file's seed
  depends only on the master seed and the file's place in the sorted list).

Usage::

    python benchmarks/batch_speed.py                               # 200 recordings
    python benchmarks/batch_speed.py --quick                       # 40 recordings
    python benchmarks/batch_speed.py --quick --method auto --recordings 20
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

# one BLAS thread in the calling process too (workers get one from fitdyn.batch)
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

CLASSES = {
    "saddle": [[0.2, 0.5], [0.4, -0.6]],
    "stable node": [[-0.6, 0.2], [0.1, -0.3]],
    "unstable node": [[0.3, 0.1], [0.05, 0.15]],
    "stable spiral": [[-0.3, 1.0], [-1.0, -0.3]],
    "unstable spiral": [[0.1, 1.0], [-1.0, 0.1]],
}


def _make_folder(folder: Path, n: int, samples: int) -> None:
    import fitdyn
    from fitdyn.simulate import write_csv

    mats = list(CLASSES.values())
    rng = np.random.default_rng(2024)
    for i in range(n):
        A = np.array(mats[i % len(mats)])
        x0 = rng.normal(size=2) * 2.0
        rec = fitdyn.simulate(
            A,
            [1.0, -1.0],
            x0,
            np.arange(samples) * 0.1,
            process_noise=0.02,
            measurement_noise=0.002,
            seed=int(rng.integers(2**31)),
        )
        write_csv(rec, folder / f"rec_{i:04d}.csv")


def _one(folder: str, workers: int, bootstrap: int, method: str, table: str) -> None:
    """Child process: one configuration; prints its figures as JSON."""
    import fitdyn

    t0 = time.perf_counter()
    t = fitdyn.batch(
        folder,
        workers=workers,
        bootstrap=bootstrap,
        method=method,
        seed=1,
        quiet=True,
        out=table,
    )
    wall = time.perf_counter() - t0
    self_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    kids_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    print(
        json.dumps(
            {
                "wall": wall,
                "ok": int((t["status"] == "ok").sum()),
                "n": len(t),
                "parent_mb": self_kb / 1024,
                "worker_mb": kids_kb / 1024 if workers > 1 else None,
                "methods": t["method"].value_counts().to_dict(),
            }
        )
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="40 recordings, bootstrap 50")
    ap.add_argument("--recordings", type=int, default=None)
    ap.add_argument("--samples", type=int, default=200)
    ap.add_argument("--bootstrap", type=int, default=None, help="replicates of the 2nd setting")
    ap.add_argument("--method", default="discrete", help="estimator (default discrete)")
    ap.add_argument("--one", nargs=5, metavar=("FOLDER", "WORKERS", "B", "METHOD", "TABLE"),
                    help=argparse.SUPPRESS)  # fmt: skip
    args = ap.parse_args()
    if args.one:
        folder, w, b, method, table = args.one
        _one(folder, int(w), int(b), method, table)
        return
    n = args.recordings or (40 if args.quick else 200)
    B = args.bootstrap or (50 if args.quick else 100)

    import pandas as pd

    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "recordings"
        folder.mkdir()
        _make_folder(folder, n, args.samples)
        for b in (0, B):
            reference = None
            for w in (1, 2):
                table = Path(tmp) / f"table_{b}_{w}.csv"
                res = subprocess.run(
                    [
                        sys.executable,
                        __file__,
                        "--one",
                        str(folder),
                        str(w),
                        str(b),
                        args.method,
                        str(table),
                    ],  # fmt: skip
                    capture_output=True,
                    text=True,
                    check=True,
                )
                fig = json.loads(res.stdout.strip().splitlines()[-1])
                t = pd.read_csv(table)
                if reference is None:
                    reference = t
                same = t.equals(reference)
                rows.append((b, w, fig, same))

    print(
        f"batch speed: {n} simulated recordings of {args.samples} samples, "
        f"method {args.method}, "
        f"on {os.cpu_count()} cores, one BLAS thread per process"
    )
    print()
    print(
        "| bootstrap | workers | total s | ms per recording | fitted | parent peak MB "
        "| largest worker MB | same table as 1 worker |"
    )
    print("|---|---|---|---|---|---|---|---|")
    for b, w, fig, same in rows:
        wmb = "-" if fig["worker_mb"] is None else f"{fig['worker_mb']:.0f}"
        print(
            f"| {b} | {w} | {fig['wall']:.1f} | {1000 * fig['wall'] / fig['n']:.0f} "
            f"| {fig['ok']}/{fig['n']} | {fig['parent_mb']:.0f} | {wmb} "
            f"| {'yes' if same else 'NO'} |"
        )
    methods = rows[0][2]["methods"]
    print()
    print("estimators used: " + ", ".join(f"{k} {v}" for k, v in methods.items()))


if __name__ == "__main__":
    main()
