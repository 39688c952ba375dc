"""Command-line interface: argument parsing only; the work is done by the public API.

Errors that fitdyn raises on purpose are printed in one line and exit with status 2;
no traceback is shown (``--debug`` shows one).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from typing import Any

from fitdyn import __version__
from fitdyn.analysis import CALIBRATED_REPLICATES, DEFAULT_REPLICATES
from fitdyn.bootstrap import SCHEMES
from fitdyn.errors import FitdynError
from fitdyn.estimators import METHODS
from fitdyn.estimators.derivative import DERIVATIVES

__all__ = ["main", "build_parser"]


def _pair(text: str, what: str) -> list[float]:
    parts = [p for p in text.replace(";", ",").split(",") if p.strip()]
    try:
        values = [float(p) for p in parts]
    except ValueError:
        values = []
    if len(values) != 2:
        raise FitdynError(f"{what} must be two numbers separated by a comma, got '{text}'")
    from fitdyn.safety import check_pair

    check_pair(values, what)
    return values


def _matrix(text: str) -> list[list[float]]:
    rows = [r for r in text.split(";") if r.strip()]
    try:
        m = [[float(v) for v in r.split(",")] for r in rows]
    except ValueError:
        m = []
    if len(m) != 2 or any(len(r) != 2 for r in m):
        raise FitdynError(f"--matrix must look like 'a11,a12;a21,a22', got '{text}'")
    from fitdyn.safety import check_pair

    check_pair(m[0] + m[1], "--matrix")
    return m


_FILE_HELP = "the recording: .csv, .tsv, .txt, .xlsx or .parquet"


def _add_import_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("reading the file")
    g.add_argument(
        "--time",
        metavar="COL",
        help="time column (default: found by name, else the first increasing numeric column)",
    )
    g.add_argument(
        "--channels",
        metavar="A,B",
        help="the two channel columns (default: the two numeric columns besides time and "
        "trajectory)",
    )
    g.add_argument(
        "--trajectory",
        metavar="COL",
        help="column that names runs / replicates (default: found by name such as run or "
        "replicate, else one trajectory)",
    )
    g.add_argument(
        "--time-unit",
        metavar="UNIT",
        help="unit of the time column, e.g. s or min; timestamps are converted to it "
        "(default: from the header, else none; s for timestamps); A and the eigenvalues "
        "are in 1/UNIT",
    )
    g.add_argument(
        "--sheet", metavar="NAME", help="worksheet of an .xlsx file (default: the first)"
    )
    g.add_argument(
        "--repeated-times",
        choices=("average", "refuse"),
        default=None,
        help="rows repeating a timestamp: average them or stop with an error "
        "(choices: %(choices)s; default average)",
    )
    g.add_argument(
        "--outliers",
        choices=("flag", "drop", "ignore"),
        default=None,
        help="outliers found by the Hampel identifier: flag and keep them, drop them, or "
        "do not look (choices: %(choices)s; default flag)",
    )
    g.add_argument(
        "--gap-factor",
        type=float,
        default=None,
        metavar="K",
        help="a step longer than K times the median step is a gap (a number, no unit; default 3)",
    )
    g.add_argument(
        "--time-jumps",
        choices=("split", "refuse", "sort"),
        default=None,
        help="what to do when time jumps back in file order (a repeated clock hour, a clock "
        "restart): split (into separate trajectories; the default), refuse (stop with an "
        "error) or sort (sort by time); choices: %(choices)s",
    )
    g.add_argument(
        "--max-bytes",
        type=int,
        default=None,
        metavar="N",
        help="largest file read, in bytes (default: 1 GiB)",
    )
    g.add_argument(
        "--max-line",
        type=int,
        default=None,
        metavar="N",
        help="longest line read, in characters (default: 100000)",
    )


def _read_options(args: argparse.Namespace) -> dict[str, Any]:
    opts: dict[str, Any] = {}
    if args.time:
        opts["time"] = args.time
    if args.channels:
        chans = [c.strip() for c in args.channels.split(",")]
        if len(chans) != 2 or not all(chans):
            raise FitdynError(f"--channels needs two column names like A,B, got '{args.channels}'")
        opts["channels"] = chans
    if args.trajectory:
        opts["trajectory"] = args.trajectory
    if args.time_unit:
        opts["time_unit"] = args.time_unit
    if args.sheet:
        opts["sheet"] = args.sheet
    if args.repeated_times:
        opts["repeated_times"] = args.repeated_times
    if args.outliers:
        opts["outliers"] = args.outliers
    if args.gap_factor is not None:
        opts["gap_factor"] = args.gap_factor
    if args.time_jumps:
        opts["time_jumps"] = args.time_jumps
    if args.max_bytes is not None:
        opts["max_bytes"] = args.max_bytes
    if args.max_line is not None:
        opts["max_line"] = args.max_line
    return opts


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    parser = argparse.ArgumentParser(
        prog="fitdyn",
        description=(
            "Estimate the linear dynamics dx/dt = A (x - x*) of two measured quantities "
            "near an equilibrium, with eigenvalue intervals and class probabilities."
        ),
    )
    parser.add_argument("--version", action="version", version=f"fitdyn {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("check", help="read and clean a recording; print what was done")
    p.add_argument("file", help=_FILE_HELP)
    _add_import_options(p)
    p.add_argument(
        "--json", metavar="PATH", help="write the cleaning summary as JSON (default: not written)"
    )
    p.add_argument(
        "--write-clean",
        metavar="PATH",
        help="write the cleaned samples as CSV (default: not written)",
    )

    p = sub.add_parser("fit", help="estimate A, classify the equilibrium, report")
    p.add_argument("file", help=_FILE_HELP)
    _add_import_options(p)
    _add_estimation_options(
        p, seed_help="random seed (default: none, fresh numbers each run)", bootstrap=1000
    )
    p.add_argument(
        "--window",
        metavar="SPEC",
        help="fit part of the data: amplitude:F keeps each trajectory after it settles "
        "within F (0-1) of its largest distance from the equilibrium; time:START:END "
        "keeps that time interval (either bound may be empty) (default: all the data)",
    )
    o = p.add_argument_group("output")
    o.add_argument("--json", metavar="PATH", help="write the result as JSON (default: not written)")
    o.add_argument(
        "--report",
        metavar="DIR",
        help="write a self-contained HTML report folder (default: not written)",
    )
    o.add_argument("--quiet", action="store_true", help="no progress bar, no summary")
    o.add_argument(
        "--verbose",
        action="store_true",
        help="also print how the estimator and the resampling were chosen",
    )

    p = sub.add_parser("simulate", help="simulate a recording from a known linear system")
    p.add_argument(
        "--matrix",
        required=True,
        metavar="a11,a12;a21,a22",
        help="system matrix, row by row (write --matrix=... when it starts with a minus)",
    )
    p.add_argument(
        "--equilibrium",
        default="0,0",
        metavar="X,Y",
        help="equilibrium x*, in the channels' units (default %(default)s)",
    )
    p.add_argument(
        "--x0", required=True, metavar="X,Y", help="initial state, in the channels' units"
    )
    p.add_argument(
        "--samples",
        type=int,
        default=200,
        metavar="N",
        help="samples per trajectory (default %(default)s)",
    )
    p.add_argument(
        "--step",
        type=float,
        default=0.1,
        metavar="H",
        help="sampling step, in the time unit of A (default %(default)s)",
    )
    p.add_argument(
        "--irregular",
        action="store_true",
        help="random (sorted uniform) times over the same span (default: a uniform step)",
    )
    p.add_argument(
        "--trajectories",
        type=int,
        default=1,
        metavar="R",
        help="independent runs from the same x0 (default %(default)s)",
    )
    p.add_argument(
        "--process-noise",
        type=float,
        default=None,
        metavar="Q",
        help="diffusion rate of the process noise, in (channel unit)^2 per time unit "
        "(default: none)",
    )
    p.add_argument(
        "--measurement-noise",
        type=float,
        default=None,
        metavar="SD",
        help="standard deviation of the sensor noise, in the channels' units (default: none)",
    )
    p.add_argument(
        "--seed", type=int, default=None, metavar="S", help="random seed (default: none)"
    )
    p.add_argument("--out", required=True, metavar="PATH", help="CSV file to write")

    p = sub.add_parser(
        "batch",
        help="fit many recordings (in parallel); one results table",
        description=(
            "Fit every recording with the same options and write one table, one row per "
            "file. A file that cannot be fitted gets status 'error' and the reason; the "
            "others go on. Each file's seed comes from --seed and its place in the "
            "sorted list, so the table does not depend on --workers. Columns label and "
            "stability are the point estimate; verdict_stability, verdict_label and "
            "verdict_candidates are the verdict at --confidence (with --bootstrap > 0 or "
            "--asymptotic; 'not assessed' otherwise); not_reliable, checks_warn, "
            "checks_fail and check_<name> give the adequacy checks."
        ),
    )
    p.add_argument(
        "sources",
        nargs="+",
        metavar="SOURCE",
        help="recordings: files, folders (their csv/tsv/txt/xlsx/parquet files) or quoted "
        "glob patterns such as 'runs/**/*.csv'",
    )
    _add_import_options(p)
    _add_estimation_options(
        p,
        seed_help="master seed; each file's own seed is in the table (default: none)",
        bootstrap=0,
        bootstrap_note=(
            "; the batch default 0 is for speed over many files: its table's "
            "verdict_stability and verdict_label then say 'not assessed' and label/stability "
            "are point estimates with no confidence"
        ),
    )
    r = p.add_argument_group("running")
    r.add_argument(
        "--workers", type=int, default=1, metavar="N", help="processes (default %(default)s)"
    )
    r.add_argument(
        "--backend",
        choices=("process", "dask"),
        default="process",
        help='local process pool or Dask (pip install "fitdyn[dask]") (choices: '
        "%(choices)s; default %(default)s)",
    )
    r.add_argument(
        "--chunk",
        type=int,
        default=None,
        metavar="K",
        help="files per task (default: chosen from the number of files and workers)",
    )
    o = p.add_argument_group("output")
    o.add_argument("--out", required=True, metavar="PATH", help="results table (.csv, or .parquet)")
    o.add_argument(
        "--json-dir",
        metavar="DIR",
        help="also write each fit's JSON result here (default: not written)",
    )
    o.add_argument("--quiet", action="store_true", help="no progress bar, no summary")
    _add_plan_parser(sub)
    return parser


def _add_plan_parser(sub: Any) -> None:
    p = sub.add_parser(
        "plan",
        help="plan the next experiment by simulation: how long, how often, how many runs",
        description=(
            "Simulate candidate experiments from a fitted model (a 'fitdyn fit --json' "
            "file) or from a given matrix and noise, fit each as 'fit' would, and report "
            "the cheapest design that reaches the target with the required probability, "
            "with Monte Carlo standard errors."
        ),
    )
    p.add_argument(
        "result",
        nargs="?",
        help="JSON result of 'fitdyn fit --json' (default: none; then --matrix and the "
        "current design describe the model)",
    )
    p.add_argument(
        "--data",
        metavar="PATH",
        help="the recording the result was fitted from (default: the result's source)",
    )
    t = p.add_argument_group("target")
    t.add_argument(
        "--target",
        nargs="+",
        default=["stability"],
        metavar="KIND",
        help="stability (verdict decided), class (true class at the confidence) or "
        "width W (interval of the largest real part at most W wide, in 1/time unit; W "
        "absolute or like 20%% of |Re lambda|) (default: %(default)s)",
    )
    t.add_argument(
        "--probability",
        type=float,
        default=0.8,
        metavar="P",
        help="required probability that the experiment reaches the target (default %(default)s)",
    )
    t.add_argument(
        "--confidence",
        type=float,
        default=0.95,
        metavar="C",
        help="confidence level of the verdicts and intervals (default %(default)s)",
    )
    t.add_argument(
        "--cost",
        choices=("samples", "time"),
        default="samples",
        help="what a design costs: samples (total samples) or time (duration x runs) "
        "(choices: %(choices)s; default %(default)s)",
    )
    g = p.add_argument_group("candidate designs (default: factors of the current design)")
    g.add_argument(
        "--steps",
        metavar="H,..",
        help="sampling steps, in the time unit (default: the current step x 2, 1, 1/2)",
    )
    g.add_argument(
        "--durations",
        metavar="T,..",
        help="durations of each run, in the time unit (default: the current x 1/2, 1, 2, 4)",
    )
    g.add_argument("--runs", metavar="R,..", help="numbers of runs (default: the current x 1, 2)")
    g.add_argument(
        "--amplitudes", metavar="A,..", help="initial displacement factors (default: 1, 2)"
    )
    s = p.add_argument_group("simulation")
    s.add_argument(
        "--simulations",
        type=int,
        default=60,
        metavar="N",
        help="simulated experiments per design, at most (default %(default)s)",
    )
    s.add_argument(
        "--intervals",
        choices=("spread", "auto", "bootstrap", "full"),
        default="spread",
        help="uncertainty of each simulated experiment: spread (normal approximation from "
        "the design's simulated estimates), auto (bootstrap for the regression "
        "estimators, spread for the iterative ones), bootstrap, or full (fit's default) "
        "(choices: %(choices)s; default %(default)s)",
    )
    s.add_argument(
        "--method",
        default="auto",
        choices=METHODS,
        help="estimator of the simulated fits (choices: %(choices)s; default %(default)s, "
        "chosen per design family)",
    )
    s.add_argument(
        "--replicates",
        type=int,
        default=100,
        metavar="B",
        help="bootstrap replicates per simulated experiment (default %(default)s)",
    )
    s.add_argument(
        "--budget",
        type=int,
        default=250_000,
        metavar="S",
        help="work of the iterative fits in all (samples x parameters; default 250000)",
    )
    s.add_argument(
        "--seed", type=int, default=None, metavar="S", help="random seed (default: none)"
    )
    m = p.add_argument_group("a given model instead of a result")
    m.add_argument(
        "--matrix",
        metavar="a11,a12;a21,a22",
        help="system matrix in 1/time unit, rows separated by ';' (write --matrix=... if "
        "an entry is negative; default: none)",
    )
    m.add_argument(
        "--x0",
        metavar="X,Y",
        help="initial state of the current design (channel units; default: none)",
    )
    m.add_argument(
        "--equilibrium",
        metavar="X,Y",
        default=None,
        help="equilibrium in channel units (default: 0,0)",
    )
    m.add_argument(
        "--step",
        type=float,
        metavar="H",
        help="current sampling step, in the time unit (default: none)",
    )
    m.add_argument(
        "--duration",
        type=float,
        metavar="T",
        help="current run length, in the time unit (default: none)",
    )
    m.add_argument(
        "--current-runs",
        type=int,
        default=1,
        metavar="R",
        help="runs of the current design (default %(default)s)",
    )
    m.add_argument(
        "--process-noise",
        type=float,
        default=None,
        metavar="Q",
        help="process-noise intensity per channel, (channel unit)^2 per time unit (default: none)",
    )
    m.add_argument(
        "--measurement-noise",
        type=float,
        default=None,
        metavar="SD",
        help="measurement-noise sd, in channel units (default: none)",
    )
    o = p.add_argument_group("output")
    o.add_argument(
        "--table", metavar="PATH", help="write the table (.md: markdown; default: not written)"
    )
    o.add_argument(
        "--plot", metavar="PATH", help="write the figure (.png, .svg, .pdf; default: not written)"
    )
    o.add_argument("--json", metavar="PATH", help="write the plan as JSON (default: not written)")
    o.add_argument("--quiet", action="store_true", help="no progress bar, no summary")


def _add_estimation_options(
    p: argparse.ArgumentParser,
    seed_help: str,
    bootstrap: int = DEFAULT_REPLICATES,
    bootstrap_note: str = "",
) -> None:
    g = p.add_argument_group("estimation")
    g.add_argument(
        "--method",
        default="auto",
        choices=METHODS,
        help="estimator (choices: %(choices)s; default %(default)s: chosen from the data)",
    )
    g.add_argument(
        "--equilibrium",
        metavar="X,Y",
        help="known equilibrium, in the channels' units (default: estimated)",
    )
    g.add_argument(
        "--derivative",
        choices=DERIVATIVES,
        help="derivative method of the derivative fit (choices: %(choices)s; default: "
        "savgol on uniform segments, local on irregular ones)",
    )
    calibrated = (
        f"; intervals are calibrated from {CALIBRATED_REPLICATES} on (benchmarks/coverage.py), "
        "fewer get a warning"
    )
    g.add_argument(
        "--bootstrap",
        type=int,
        default=bootstrap,
        metavar="B",
        help="bootstrap replicates, 0 for none (no intervals, no verdict at a confidence); "
        "default %(default)s" + calibrated + bootstrap_note,
    )
    g.add_argument(
        "--confidence",
        type=float,
        default=0.95,
        metavar="C",
        help="level of the intervals and the verdict, between 0 and 1 (default %(default)s)",
    )
    g.add_argument("--seed", type=int, default=None, metavar="S", help=seed_help)
    g.add_argument(
        "--scheme",
        default="auto",
        choices=SCHEMES,
        help="resampling scheme (choices: %(choices)s; default %(default)s: chosen for the "
        "estimator)",
    )
    g.add_argument(
        "--interval",
        choices=("percentile", "bca"),
        default="percentile",
        help="interval kind (choices: %(choices)s; default %(default)s)",
    )
    g.add_argument(
        "--margin",
        type=float,
        default=None,
        metavar="M",
        help="practical-equivalence margin for the boundary classes, a fraction with no "
        "unit (relative to the largest |eigenvalue|, e.g. 0.01; default: none)",
    )
    g.add_argument(
        "--asymptotic",
        action="store_true",
        help="fast delta-method intervals instead of the bootstrap (default: bootstrap)",
    )


def _estimation_options(args: argparse.Namespace) -> dict[str, Any]:
    """The keywords of fitdyn.fit given on the command line (checked)."""
    settings: dict[str, Any] = {}
    if args.derivative:
        settings["derivative"] = args.derivative
    eq: Any = "estimate"
    if args.equilibrium:
        eq = _pair(args.equilibrium, "--equilibrium")
    if args.bootstrap < 0:
        raise FitdynError(f"--bootstrap must be 0 or more, got {args.bootstrap}")
    if not 0 < args.confidence < 1:
        raise FitdynError(f"--confidence must be between 0 and 1, got {args.confidence}")
    return {
        "method": args.method,
        "equilibrium": eq,
        "bootstrap": args.bootstrap,
        "confidence": args.confidence,
        "seed": args.seed,
        "scheme": args.scheme,
        "interval": args.interval,
        "margin": args.margin,
        "asymptotic": args.asymptotic,
        "settings": settings or None,
    }


def _print(text: str) -> None:
    """Print, replacing what the terminal's encoding cannot show (e.g. ``∞``)."""
    try:
        print(text)
    except UnicodeEncodeError:
        enc = getattr(sys.stdout, "encoding", None) or "ascii"
        print(text.replace("∞", "inf").encode(enc, "replace").decode(enc))


def _cmd_check(args: argparse.Namespace) -> int:
    from fitdyn.importer import read

    rec = read(args.file, **_read_options(args))
    # files first, then the text: a reader that stops early (| head) loses no file
    if args.json:
        from fitdyn.atomic import write_text

        write_text(args.json, json.dumps(rec.describe(), indent=2) + "\n")
    if args.write_clean:
        from fitdyn.atomic import write_csv_frame

        write_csv_frame(args.write_clean, rec.to_frame())
    _print(rec.summary())
    return 0


def _cmd_fit(args: argparse.Namespace) -> int:
    from fitdyn.analysis import fit

    result = fit(
        args.file,
        **_estimation_options(args),
        quiet=args.quiet or not sys.stderr.isatty(),
        window=args.window,
        **_read_options(args),
    )
    # files first, then the text: a reader that stops early (| head) loses no file
    if args.json:
        result.to_json(args.json)
    path = result.report(args.report) if args.report else None
    if not args.quiet:
        _print(result.summary(verbose=args.verbose))
        if path is not None:
            _print(f"\nreport written to {path}")
    return 0


def _cmd_simulate(args: argparse.Namespace) -> int:
    import numpy as np

    from fitdyn.simulate import simulate, write_csv

    rng = np.random.default_rng(args.seed)
    if args.samples < 3:
        raise FitdynError(f"--samples must be at least 3, got {args.samples}")
    if args.irregular:
        span = args.step * (args.samples - 1)
        times = [
            np.sort(np.concatenate([[0.0], rng.uniform(0, span, args.samples - 1)]))
            for _ in range(args.trajectories)
        ]
    else:
        times = np.arange(args.samples) * args.step
    rec = simulate(
        _matrix(args.matrix),
        _pair(args.equilibrium, "--equilibrium"),
        _pair(args.x0, "--x0"),
        times,
        process_noise=args.process_noise,
        measurement_noise=args.measurement_noise,
        trajectories=args.trajectories,
        seed=None if args.seed is None else int(rng.integers(2**63)),
    )
    write_csv(rec, args.out)
    print(f"wrote {rec.n_samples} samples in {rec.n_trajectories} trajectories to {args.out}")
    return 0


def _cmd_batch(args: argparse.Namespace) -> int:
    from fitdyn.batch import batch, summary

    opts = _estimation_options(args)
    table = batch(
        args.sources,
        out=args.out,
        json_dir=args.json_dir,
        workers=args.workers,
        backend=args.backend,
        chunk=args.chunk,
        quiet=args.quiet,
        **opts,
        **_read_options(args),
    )
    if not args.quiet:
        print(summary(table, args.out))
    failed = int((table["status"] != "ok").sum())
    if failed:
        print(
            f"fitdyn: {failed} of {len(table)} recordings failed; their rows in {args.out} "
            "have status 'error' and the reason in 'message'",
            file=sys.stderr,
        )
    return 0


def _numbers(text: str | None, what: str, kind: type = float) -> list[Any] | None:
    if text is None:
        return None
    try:
        out = [kind(v) for v in text.split(",") if v.strip()]
    except ValueError:
        out = []
    if not out:
        raise FitdynError(f"{what} must be numbers separated by commas, got '{text}'")
    return out


def _cmd_plan(args: argparse.Namespace) -> int:
    from fitdyn.plan import plan

    kind, *rest = args.target
    width = None
    if kind == "width":
        if len(rest) != 1:
            raise FitdynError("--target width needs one width, e.g. --target width 0.02 or 20%")
        width = rest[0]
    elif rest:
        raise FitdynError(f"--target {kind} takes no value, got '{' '.join(rest)}'")
    if (args.result is None) == (args.matrix is None):
        raise FitdynError("give a fit result (JSON file) or --matrix with --x0, --step, --duration")
    given: dict[str, Any] = {}
    if args.matrix is not None:
        if args.x0 is None or args.step is None or args.duration is None:
            raise FitdynError("--matrix needs --x0, --step and --duration of the current design")
        given = {
            "matrix": _matrix(args.matrix),
            "x0": _pair(args.x0, "--x0"),
            "step": args.step,
            "duration": args.duration,
            "current_runs": args.current_runs,
            "equilibrium": None
            if args.equilibrium is None
            else _pair(args.equilibrium, "--equilibrium"),
        }
    result = plan(
        args.result,
        target=kind,
        width=width,
        probability=args.probability,
        confidence=args.confidence,
        cost=args.cost,
        simulations=args.simulations,
        intervals=args.intervals,
        method=args.method,
        replicates=args.replicates,
        budget=args.budget,
        steps=_numbers(args.steps, "--steps"),
        durations=_numbers(args.durations, "--durations"),
        runs=_numbers(args.runs, "--runs", int),
        amplitudes=_numbers(args.amplitudes, "--amplitudes"),
        seed=args.seed,
        data=args.data,
        process_noise=args.process_noise,
        measurement_noise=args.measurement_noise,
        quiet=args.quiet or not sys.stderr.isatty(),
        **given,
    )
    if args.table:
        result.write_table(args.table)
    if args.plot:
        result.plot(args.plot)
    if args.json:
        result.to_json(args.json)
    if not args.quiet:  # after the files: a reader that stops early loses none
        _print(result.summary())
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler = {
        "check": _cmd_check,
        "fit": _cmd_fit,
        "simulate": _cmd_simulate,
        "batch": _cmd_batch,
        "plan": _cmd_plan,
    }[args.command]
    from fitdyn.safety import Terminated, check_cli_args, cli_outputs, exit_on_signals

    try:
        with exit_on_signals():
            check_cli_args(args)
            cli_outputs(args)
            return handler(args)
    except Terminated as exc:
        print("fitdyn: stopped by a signal; temporary files removed", file=sys.stderr)
        return int(exc.code or 1)
    except FitdynError as exc:
        if args.debug:
            raise
        print(f"fitdyn: error: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into a program that stopped reading
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except OSError as exc:
        if args.debug:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"fitdyn: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("fitdyn: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an unforeseen failure: one line, status 1
        if args.debug:
            raise
        from fitdyn.errors import shorten

        print(
            "fitdyn: internal error: "
            + shorten(f"{type(exc).__name__}: {exc}")
            + " (rerun with --debug for details and please report it)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
