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
from fitdyn.errors import FitdynError
from fitdyn.estimators import METHODS

__all__ = ["main", "build_parser"]


def _pair(text: str, what: str) -> list[float]:
    parts = [p for p in text.replace(";", ",").split(",") if p.strip()]
    try:
        values = [float(p) for p in parts]
    except ValueError:
        values = []
    if len(values) != 2:
        raise FitdynError(f"{what} must be two numbers separated by a comma, got '{text}'")
    return values


def _matrix(text: str) -> list[list[float]]:
    rows = [r for r in text.split(";") if r.strip()]
    try:
        m = [[float(v) for v in r.split(",")] for r in rows]
    except ValueError:
        m = []
    if len(m) != 2 or any(len(r) != 2 for r in m):
        raise FitdynError(f"--matrix must look like 'a11,a12;a21,a22', got '{text}'")
    return m


def _add_import_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("reading the file")
    g.add_argument("--time", metavar="COL", help="time column (default: found by name or order)")
    g.add_argument("--channels", metavar="A,B", help="the two channel columns")
    g.add_argument("--trajectory", metavar="COL", help="column that names runs / replicates")
    g.add_argument("--time-unit", metavar="UNIT", help="unit of a numeric time column")
    g.add_argument("--sheet", metavar="NAME", help="worksheet of an .xlsx file")
    g.add_argument(
        "--repeated-times",
        choices=("average", "refuse"),
        default=None,
        help="rows repeating a timestamp: average them (default) or stop with an error",
    )
    g.add_argument(
        "--outliers",
        choices=("flag", "drop", "ignore"),
        default=None,
        help="outliers found by the Hampel identifier: flag and keep (default), drop, ignore",
    )
    g.add_argument(
        "--gap-factor",
        type=float,
        default=None,
        metavar="K",
        help="a step longer than K times the median step is a gap (default 3)",
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
    p.add_argument("file")
    _add_import_options(p)
    p.add_argument("--json", metavar="PATH", help="write the cleaning summary as JSON")
    p.add_argument("--write-clean", metavar="PATH", help="write the cleaned samples as CSV")

    p = sub.add_parser("fit", help="estimate A, classify the equilibrium, report")
    p.add_argument("file")
    _add_import_options(p)
    _add_estimation_options(p, seed_help="random seed")
    o = p.add_argument_group("output")
    o.add_argument("--json", metavar="PATH", help="write the result as JSON")
    o.add_argument("--report", metavar="DIR", help="write a self-contained HTML report folder")
    o.add_argument("--quiet", action="store_true", help="no progress bar, no summary")

    p = sub.add_parser("simulate", help="simulate a recording from a known linear system")
    p.add_argument(
        "--matrix",
        required=True,
        metavar="a11,a12;a21,a22",
        help="system matrix, row by row (write --matrix=... when it starts with a minus)",
    )
    p.add_argument("--equilibrium", default="0,0", metavar="X,Y")
    p.add_argument("--x0", required=True, metavar="X,Y", help="initial state")
    p.add_argument("--samples", type=int, default=200, metavar="N")
    p.add_argument("--step", type=float, default=0.1, metavar="H", help="sampling step")
    p.add_argument("--irregular", action="store_true", help="random (sorted uniform) times")
    p.add_argument("--trajectories", type=int, default=1, metavar="R")
    p.add_argument("--process-noise", type=float, default=None, metavar="Q")
    p.add_argument("--measurement-noise", type=float, default=None, metavar="SD")
    p.add_argument("--seed", type=int, default=None, metavar="S")
    p.add_argument("--out", required=True, metavar="PATH", help="CSV file to write")

    p = sub.add_parser(
        "batch",
        help="fit many recordings (in parallel); one results table",
        description=(
            "Fit every recording with the same options and write one table, one row per "
            "file. A file that cannot be fitted gets status 'error' and the reason; the "
            "others go on. Each file's seed comes from --seed and its place in the "
            "sorted list, so the table does not depend on --workers."
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
    _add_estimation_options(p, seed_help="master seed (each file's own seed is in the table)")
    r = p.add_argument_group("running")
    r.add_argument("--workers", type=int, default=1, metavar="N", help="processes (default 1)")
    r.add_argument(
        "--backend",
        choices=("process", "dask"),
        default="process",
        help='local process pool (default) or Dask (pip install "fitdyn[dask]")',
    )
    r.add_argument("--chunk", type=int, default=None, metavar="K", help="files per task")
    o = p.add_argument_group("output")
    o.add_argument("--out", required=True, metavar="PATH", help="results table (.csv, or .parquet)")
    o.add_argument("--json-dir", metavar="DIR", help="also write each fit's JSON result here")
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
    p.add_argument("result", nargs="?", help="JSON result of 'fitdyn fit --json'")
    p.add_argument("--data", metavar="PATH", help="the recording the result was fitted from")
    t = p.add_argument_group("target")
    t.add_argument(
        "--target",
        nargs="+",
        default=["stability"],
        metavar="KIND",
        help="stability (verdict decided), class (true class at the confidence) or "
        "width W (interval of the largest real part at most W wide; W absolute or like 20%%)",
    )
    t.add_argument("--probability", type=float, default=0.8, metavar="P", help="default 0.8")
    t.add_argument("--confidence", type=float, default=0.95, metavar="C", help="default 0.95")
    t.add_argument("--cost", choices=("samples", "time"), default="samples")
    g = p.add_argument_group("candidate designs (default: factors of the current design)")
    g.add_argument("--steps", metavar="H,..", help="sampling steps")
    g.add_argument("--durations", metavar="T,..", help="durations of each run")
    g.add_argument("--runs", metavar="R,..", help="numbers of runs")
    g.add_argument("--amplitudes", metavar="A,..", help="initial displacement factors")
    s = p.add_argument_group("simulation")
    s.add_argument("--simulations", type=int, default=60, metavar="N", help="per design")
    s.add_argument(
        "--intervals",
        choices=("spread", "auto", "bootstrap", "full"),
        default="spread",
        help="uncertainty of each simulated experiment (default spread; auto: bootstrap "
        "for the regression estimators, spread for the iterative ones)",
    )
    s.add_argument(
        "--method",
        default="auto",
        choices=METHODS,
        help="estimator of the simulated fits (default auto, chosen per design family)",
    )
    s.add_argument("--replicates", type=int, default=100, metavar="B", help="with bootstrap")
    s.add_argument(
        "--budget",
        type=int,
        default=250_000,
        metavar="S",
        help="work of the iterative fits in all (samples x parameters; default 250000)",
    )
    s.add_argument("--seed", type=int, default=None, metavar="S")
    m = p.add_argument_group("a given model instead of a result")
    m.add_argument("--matrix", metavar="a11,a12;a21,a22", help="write --matrix=... if negative")
    m.add_argument("--x0", metavar="X,Y", help="initial state of the current design")
    m.add_argument("--equilibrium", metavar="X,Y", default=None)
    m.add_argument("--step", type=float, metavar="H", help="current sampling step")
    m.add_argument("--duration", type=float, metavar="T", help="current run length")
    m.add_argument("--current-runs", type=int, default=1, metavar="R")
    m.add_argument("--process-noise", type=float, default=None, metavar="Q")
    m.add_argument("--measurement-noise", type=float, default=None, metavar="SD")
    o = p.add_argument_group("output")
    o.add_argument("--table", metavar="PATH", help="write the table (.md: markdown)")
    o.add_argument("--plot", metavar="PATH", help="write the figure (.png, .svg, .pdf)")
    o.add_argument("--json", metavar="PATH", help="write the plan as JSON")
    o.add_argument("--quiet", action="store_true", help="no progress bar, no summary")


def _add_estimation_options(p: argparse.ArgumentParser, seed_help: str) -> None:
    g = p.add_argument_group("estimation")
    g.add_argument(
        "--method",
        default="auto",
        choices=METHODS,
        help="estimator (default auto: chosen from the data)",
    )
    g.add_argument("--equilibrium", metavar="X,Y", help="known equilibrium (default: estimate)")
    g.add_argument("--derivative", choices=("fd", "savgol", "spline"), help="derivative method")
    g.add_argument("--bootstrap", type=int, default=0, metavar="B", help="bootstrap replicates")
    g.add_argument("--confidence", type=float, default=0.95, metavar="C", help="interval level")
    g.add_argument("--seed", type=int, default=None, metavar="S", help=seed_help)
    g.add_argument("--scheme", default="auto", help="resampling scheme (default auto)")
    g.add_argument(
        "--interval", choices=("percentile", "bca"), default="percentile", help="interval kind"
    )
    g.add_argument(
        "--margin",
        type=float,
        default=None,
        metavar="M",
        help="practical-equivalence margin for the boundary classes (e.g. 0.01)",
    )
    g.add_argument(
        "--asymptotic", action="store_true", help="fast delta-method intervals, no bootstrap"
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


def _cmd_check(args: argparse.Namespace) -> int:
    from fitdyn.importer import read

    rec = read(args.file, **_read_options(args))
    print(rec.summary())
    if args.json:
        from fitdyn.atomic import write_text

        write_text(args.json, json.dumps(rec.describe(), indent=2) + "\n")
    if args.write_clean:
        from fitdyn.atomic import write_with

        frame = rec.to_frame()
        write_with(args.write_clean, lambda p: frame.to_csv(p, index=False))
    return 0


def _cmd_fit(args: argparse.Namespace) -> int:
    from fitdyn.analysis import fit

    result = fit(
        args.file,
        **_estimation_options(args),
        quiet=args.quiet or not sys.stderr.isatty(),
        **_read_options(args),
    )
    if not args.quiet:
        print(result.summary())
    if args.json:
        result.to_json(args.json)
    if args.report:
        path = result.report(args.report)
        if not args.quiet:
            print(f"\nreport written to {path}")
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
    if not args.quiet:
        print(result.summary())
    if args.table:
        result.write_table(args.table)
    if args.plot:
        result.plot(args.plot)
    if args.json:
        result.to_json(args.json)
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
    try:
        return handler(args)
    except FitdynError as exc:
        if args.debug:
            raise
        print(f"fitdyn: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        if isinstance(exc, BrokenPipeError):
            raise
        if args.debug:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"fitdyn: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into a program that stopped reading
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print("fitdyn: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an unforeseen failure: one line, status 1
        if args.debug:
            raise
        print(
            f"fitdyn: internal error: {type(exc).__name__}: {exc} "
            "(rerun with --debug for details and please report it)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
