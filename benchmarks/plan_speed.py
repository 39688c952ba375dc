"""How long `fitdyn plan` takes on the demo files, and what its shortcuts cost.

Part 1 (speed): for each demo file, `fitdyn fit FILE --json` and then
`fitdyn plan RESULT.json` with the default settings, each as a separate process
(wall-clock time, imports included), for the stability target and for a 10 % width
target.  Prints the time, the designs simulated, the simulated experiments per
design and the answer.

Part 2 (accuracy of the shortcut): on a few designs of a constructed system, the
probability of reaching the stability target with the planner's default
``intervals="spread"`` (one estimator per design family, each experiment's
uncertainty from the spread of the simulated estimates), with ``"bootstrap"`` (100
replicates per experiment) and with ``"full"`` (``fitdyn.fit(method="auto",
bootstrap=1000)`` on every experiment, what ``fit --bootstrap 1000`` does), each with
its binomial Monte Carlo SE.

    python benchmarks/plan_speed.py            # both parts
    python benchmarks/plan_speed.py --quick    # stability target only, fewer simulations

Timings depend on the machine and on what else runs on it.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
DEMOS = ("chamber_cooling", "reactor_runaway", "torsion_rig")


def _run(args: list[str]) -> float:
    env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1")
    t = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "fitdyn", *args],
        check=True,
        env=env,
        stdout=subprocess.DEVNULL,
        cwd=ROOT,
    )
    return time.perf_counter() - t


def speed(quick: bool) -> None:
    targets = [["stability"]] if quick else [["stability"], ["width", "10%"]]
    sims = "24" if quick else "60"
    print(
        "| demo file | target | fit (s) | plan (s) | designs simulated / grid | "
        "simulated experiments per design | answer | P(reach) +- SE | P drawn +- SE |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        for name in DEMOS:
            src = f"data_demo/{name}.csv"
            res = Path(tmp) / f"{name}.json"
            t_fit = _run(["fit", src, "--quiet", "--json", str(res)])
            for tg in targets:
                out = Path(tmp) / f"{name}_plan.json"
                t_plan = _run(
                    [
                        "plan",
                        str(res),
                        "--target",
                        *tg,
                        "--seed",
                        "1",
                        "--simulations",
                        sims,
                        "--quiet",
                        "--json",
                        str(out),
                    ]
                )
                d = json.loads(out.read_text())
                rows = d["designs"]
                done = [r for r in rows if r["simulated"] > 0]
                ns = sorted({r["simulated"] for r in done})
                c = d["chosen"]
                if d["met_now"]:
                    answer = "met now; "
                else:
                    answer = ""
                if c is None:
                    answer += "no design reaches it"
                    p = pd_ = "-"
                else:
                    answer += (
                        f"step {c['step']:.3g}, {c['runs']} x {c['duration']:.3g}, "
                        f"x{c['amplitude']:g} ({c['total_samples']} samples)"
                    )
                    p = f"{c['p']:.2f} +- {c['se']:.2f}"
                    pd_ = (
                        "-"
                        if c["p_drawn"] is None
                        else f"{c['p_drawn']:.2f} +- {c['se_drawn']:.2f}"
                    )
                print(
                    f"| {name} | {' '.join(tg)} | {t_fit:.1f} | {t_plan:.1f} | "
                    f"{len(done)} / {len(rows)} | {', '.join(map(str, ns))} | {answer} | "
                    f"{p} | {pd_} |"
                )
                sys.stdout.flush()


def shortcut(quick: bool) -> None:
    from fitdyn.plan import plan

    sims = 24 if quick else 40
    A = [[-0.3, 0.2], [0.05, -0.12]]  # slow mode -0.08: stability is hard to settle
    durations = [20.0, 40.0, 80.0] if not quick else [20.0, 80.0]
    print()
    print(
        f"Stability target at 95 %, constructed stable node A = {A}, process noise 0.01 I, "
        f"step 0.5, one run from (1, -0.5); {sims} simulated experiments per design "
        "(no early stop)."
    )
    print()
    print(
        "| duration | spread (default) | bootstrap, 100 replicates | full: auto + 1000 "
        "replicates | time spread / bootstrap / full (s) |"
    )
    print("|---|---|---|---|---|")
    res = {}
    times = {}
    for mode in ("spread", "bootstrap", "full"):
        t = time.perf_counter()
        res[mode] = plan(
            matrix=A,
            x0=[1.0, -0.5],
            step=0.5,
            duration=20.0,
            process_noise=0.01,
            steps=[0.5],
            runs=[1],
            amplitudes=[1.0],
            durations=durations,
            simulations=sims,
            stage_size=sims,
            prune=False,
            rechecks=0,
            intervals=mode,
            replicates=100,
            seed=3,
            quiet=True,
        )
        times[mode] = time.perf_counter() - t
    for k, T in enumerate(durations):
        cells = []
        for mode in ("spread", "bootstrap", "full"):
            r = sorted(res[mode].rows, key=lambda r: r.design.duration)[k]
            cells.append(f"{r.p:.2f} +- {r.se:.2f} ({r.estimator})")
        tt = (
            " / ".join(f"{times[m]:.1f}" for m in ("spread", "bootstrap", "full")) if k == 0 else ""
        )
        print(f"| {T:g} | " + " | ".join(cells) + f" | {tt} |")
    diffs = []
    for k in range(len(durations)):
        a = sorted(res["spread"].rows, key=lambda r: r.design.duration)[k]
        b = sorted(res["full"].rows, key=lambda r: r.design.duration)[k]
        diffs.append((a.p - b.p) / max(np.hypot(a.se, b.se), 1e-12))
    print()
    print("spread minus full, in combined SEs: " + ", ".join(f"{d:+.1f}" for d in diffs))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller run")
    ap.add_argument("--part", choices=("speed", "shortcut", "both"), default="both")
    a = ap.parse_args()
    print(f"machine: {os.cpu_count()} cores (shared); python {sys.version.split()[0]}")
    print()
    if a.part in ("speed", "both"):
        speed(a.quick)
    if a.part in ("shortcut", "both"):
        shortcut(a.quick)


if __name__ == "__main__":
    main()
