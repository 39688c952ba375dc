"""Guards that keep fitdyn from destroying a file, crashing or hanging.

* :func:`check_outputs` refuses an output path that resolves (symbolic links
  followed) to an input, lies inside a batch input folder, holds an input, or is
  named twice.
* :func:`check_cli_args` validates every command-line option before work starts.
* :func:`check_fit_args` and :func:`check_scale` validate the arguments and the
  numbers :func:`fitdyn.fit` is given.
* :func:`exit_on_signals` turns SIGTERM and SIGHUP into an exception, so that every
  ``finally`` block (temporary files, worker pools) runs.
"""

from __future__ import annotations

import math
import os
import signal
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from fitdyn.errors import FitdynError, InputError, OutputError

__all__ = [
    "check_outputs",
    "check_cli_args",
    "check_fit_args",
    "check_scale",
    "exit_on_signals",
    "is_fitdyn_json",
    "MAX_MAGNITUDE",
]

#: Largest magnitude of a time or channel value that the estimators are given; their
#: squared sums would overflow long before 1e308.
MAX_MAGNITUDE = 1e100
#: Smallest typical time step (in the recording's time unit) and smallest nonzero
#: channel magnitude accepted.
MIN_MAGNITUDE = 1e-100


def _real(path: str | os.PathLike) -> str:
    return os.path.realpath(os.fspath(path))


def _inside(child: str, folder: str) -> bool:
    """Whether resolved ``child`` is ``folder`` or lies below it."""
    try:
        return os.path.commonpath([child, folder]) == folder
    except ValueError:  # different drives
        return False


def is_fitdyn_json(path: str | os.PathLike) -> bool:
    """Whether an existing file is a JSON result fitdyn wrote (schema ``fitdyn/...``)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError:
        return False
    return b'"schema": "fitdyn/' in head or b'"fitdyn_version"' in head


def check_outputs(
    outputs: Sequence[tuple[str, str | os.PathLike | None]],
    inputs: Iterable[str | os.PathLike] = (),
    input_folders: Iterable[str | os.PathLike] = (),
    folders: Iterable[str] = (),
) -> None:
    """Refuse output paths that would touch an input.

    Parameters
    ----------
    outputs : sequence of (option, path)
        Each output with the option that named it (for the message); ``None`` paths
        are skipped.
    inputs : iterable of paths
        Input files.
    input_folders : iterable of paths
        Folders whose files are inputs (a batch): no output may lie inside one.
    folders : iterable of str
        Options in ``outputs`` whose path is a folder (a report, a JSON folder): it
        must not hold an input either.

    Raises
    ------
    OutputError
        With a one-line message naming the option and the input.
    """
    ins = [(os.fspath(p), _real(p)) for p in inputs]
    dirs = [(os.fspath(p), _real(p)) for p in input_folders]
    folder_opts = set(folders)
    seen: dict[str, str] = {}
    for option, path in outputs:
        if path is None:
            continue
        text = os.fspath(path)
        real = _real(path)
        for shown, r in ins:
            if real == r:
                raise OutputError(
                    f"{option} {text} is the input file {shown}; fitdyn never writes over "
                    "its input: choose another output name"
                )
            if option in folder_opts and _inside(r, real):
                raise OutputError(
                    f"{option} {text} holds the input {shown}; fitdyn never replaces a "
                    "folder holding its input: choose a new folder"
                )
        for shown, d in dirs:
            if _inside(real, d):
                raise OutputError(
                    f"{option} {text} lies inside the input folder {shown}, whose files "
                    "are all inputs; write it somewhere else"
                )
            if option in folder_opts and _inside(d, real):
                raise OutputError(
                    f"{option} {text} holds the input folder {shown}; choose a new folder"
                )
        if real in seen:
            raise OutputError(f"{option} and {seen[real]} name the same file {text}")
        seen[real] = option
        if os.path.exists(real) and option not in folder_opts and not os.path.isfile(real):
            kind = "a folder" if os.path.isdir(real) else "not a regular file"
            raise OutputError(f"{option} {text} is {kind}; give a file name such as results.csv")


# ----------------------------------------------------------------------------------
# option values
# ----------------------------------------------------------------------------------
def _finite(value: Any, what: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise FitdynError(f"{what} must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise FitdynError(f"{what} must be a finite number, got {value!r}")
    return v


def _count(value: Any, what: str, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
        raise FitdynError(f"{what} must be a whole number >= {low}, got {value!r}")


def check_fit_args(
    equilibrium: Any,
    bootstrap: Any,
    confidence: Any,
    seed: Any,
    margin: Any,
    rtol: Any,
) -> np.ndarray | None:
    """Validate the arguments of :func:`fitdyn.fit`; returns the equilibrium or None.

    Raises
    ------
    FitdynError
        One line naming the argument and the value.
    """
    eq: np.ndarray | None
    if isinstance(equilibrium, str):
        if equilibrium != "estimate":
            raise FitdynError(f"equilibrium must be 'estimate' or two numbers, got '{equilibrium}'")
        eq = None
    elif equilibrium is None:
        eq = None
    else:
        try:
            eq = np.asarray(equilibrium, dtype=float).reshape(-1)
        except (TypeError, ValueError):
            raise FitdynError(f"equilibrium must be two numbers, got {equilibrium!r}") from None
        if eq.shape != (2,):
            raise FitdynError(f"equilibrium must be two numbers, got {eq.size}")
        if not np.all(np.isfinite(eq)):
            raise FitdynError(
                f"equilibrium must be two finite numbers, got {eq[0]:g}, {eq[1]:g}; "
                "give the known equilibrium, or leave it out to estimate it"
            )
        if np.max(np.abs(eq)) > MAX_MAGNITUDE:
            raise FitdynError(
                f"equilibrium {eq[0]:g}, {eq[1]:g} is beyond +-{MAX_MAGNITUDE:g}; rescale the data"
            )
    _count(bootstrap, "bootstrap", 0)
    c = _finite(confidence, "confidence")
    if not 0 < c < 1:
        raise FitdynError(f"confidence must be between 0 and 1, got {confidence}")
    if seed is not None:
        _count(seed, "seed", 0)
    if margin is not None:
        m = _finite(margin, "margin")
        if m < 0:
            raise FitdynError(f"margin must be 0 or more, got {margin}")
    r = _finite(rtol, "rtol")
    if r < 0:
        raise FitdynError(f"rtol must be 0 or more, got {rtol}")
    return eq


def check_scale(rec: Any) -> None:
    """Refuse a recording whose numbers are beyond what the estimators can handle.

    Values near the largest float (1e308) overflow sums of squares; a time step of
    1e-300 makes rates of 1e300.  Either is refused with what to do (change the
    unit) rather than crashing inside an estimator or reporting NaN eigenvalues.

    Raises
    ------
    InputError
    """
    src = rec.source
    values = np.asarray(rec.values, dtype=float)
    times = np.asarray(rec.times, dtype=float)
    for j in range(values.shape[1] if values.ndim == 2 else 0):
        col = values[:, j]
        big = np.abs(col)
        if big.size and not np.all(np.isfinite(col)):
            raise InputError("holds non-finite values", source=src, column=rec.channels[j])
        if big.size and big.max() > MAX_MAGNITUDE:
            k = int(np.argmax(big))
            raise InputError(
                f"values up to {col[k]:.3g} are beyond +-{MAX_MAGNITUDE:g}, where the "
                "estimators' sums overflow; rescale the column (a larger unit)",
                source=src,
                column=rec.channels[j],
                row=int(rec.source_rows[k]),
            )
        nz = big[big > 0]
        if nz.size and nz.max() < MIN_MAGNITUDE:
            raise InputError(
                f"every value is below {MIN_MAGNITUDE:g} in size; rescale the column "
                "(a smaller unit)",
                source=src,
                column=rec.channels[j],
            )
    if times.size:
        if np.abs(times).max() > MAX_MAGNITUDE:
            raise InputError(
                f"times up to {np.abs(times).max():.3g} are beyond +-{MAX_MAGNITUDE:g}; "
                "use a larger time unit (time_unit=...)",
                source=src,
                column="time",
            )
        traj = np.asarray(rec.trajectory)
        steps = np.diff(times)[traj[1:] == traj[:-1]] if times.size > 1 else np.zeros(0)
        steps = steps[steps > 0]
        if steps.size:
            med = float(np.median(steps))
            span = float(np.abs(times).max())
            if med < MIN_MAGNITUDE or med < 1e-13 * span:
                raise InputError(
                    f"the typical time step {med:.3g} is too small"
                    + (f" against times up to {span:.3g}" if med >= MIN_MAGNITUDE else "")
                    + " to compute rates in floating point; use a smaller time unit "
                    "(time_unit=...) or times from the start of the recording",
                    source=src,
                    column="time",
                )


def check_cli_args(args: Any) -> None:
    """Validate the command-line options that argparse leaves unchecked.

    Raises
    ------
    FitdynError
        One line naming the option.
    """
    cmd = getattr(args, "command", None)
    for name in ("bootstrap",):
        v = getattr(args, name, None)
        if v is not None and v < 0:
            raise FitdynError(f"--{name} must be 0 or more, got {v}")
    for name, low in (("workers", 1), ("chunk", 1), ("trajectories", 1)):
        v = getattr(args, name, None)
        if v is not None and v < low:
            raise FitdynError(f"--{name} must be at least {low}, got {v}")
    seed = getattr(args, "seed", None)
    if seed is not None and seed < 0:
        raise FitdynError(f"--seed must be 0 or more, got {seed}")
    conf = getattr(args, "confidence", None)
    if conf is not None and not (math.isfinite(conf) and 0 < conf < 1):
        raise FitdynError(f"--confidence must be between 0 and 1, got {conf}")
    for name in ("margin", "process_noise", "measurement_noise"):
        v = getattr(args, name, None)
        if v is not None and not (math.isfinite(v) and v >= 0):
            raise FitdynError(f"--{name.replace('_', '-')} must be a finite number >= 0, got {v}")
    gap = getattr(args, "gap_factor", None)
    if gap is not None and not (gap > 1):  # inf is allowed: no gaps
        raise FitdynError(f"--gap-factor must be a number > 1, got {gap}")
    step = getattr(args, "step", None)
    if cmd == "simulate" and step is not None and not (math.isfinite(step) and step > 0):
        raise FitdynError(f"--step must be a positive finite number, got {step}")
    for name in ("max_bytes", "max_line"):
        v = getattr(args, name, None)
        if v is not None and v < 1:
            raise FitdynError(f"--{name.replace('_', '-')} must be at least 1, got {v}")


def check_pair(values: Sequence[float], what: str) -> None:
    """Refuse a pair of option values that are not finite (``--equilibrium nan,nan``)."""
    if not all(math.isfinite(v) for v in values):
        raise FitdynError(
            f"{what} must be finite numbers, got {', '.join(f'{v:g}' for v in values)}"
        )
    if any(abs(v) > MAX_MAGNITUDE for v in values):
        raise FitdynError(f"{what} values must lie within +-{MAX_MAGNITUDE:g}")


def cli_outputs(args: Any) -> None:
    """Check the output options of one command line against its inputs."""
    cmd = args.command
    if cmd in ("check", "fit"):
        outs = [
            ("--json", getattr(args, "json", None)),
            ("--write-clean", getattr(args, "write_clean", None)),
            ("--report", getattr(args, "report", None)),
        ]
        check_outputs(outs, inputs=[args.file], folders=("--report",))
        report = getattr(args, "report", None)
        if report is not None:
            check_report_folder(report)
    elif cmd == "batch":
        from fitdyn.batch import find_sources

        folders = [s for s in args.sources if os.path.isdir(s)]
        files = find_sources(args.sources)
        check_outputs(
            [("--out", args.out), ("--json-dir", args.json_dir)],
            inputs=files,
            input_folders=folders,
            folders=("--json-dir",),
        )
    elif cmd == "plan":
        inputs = [x for x in (getattr(args, "result", None), getattr(args, "data", None)) if x]
        check_outputs(
            [
                ("--table", getattr(args, "table", None)),
                ("--plot", getattr(args, "plot", None)),
                ("--json", getattr(args, "json", None)),
            ],
            inputs=inputs,
        )


def check_report_folder(folder: str | os.PathLike) -> None:
    """Refuse a report folder that cannot be swapped safely: the current folder or
    one above it, the root, or a symbolic link."""
    text = os.fspath(folder)
    p = Path(text)
    real = _real(p)
    cwd = os.path.realpath(os.getcwd())
    if p.is_symlink():
        raise OutputError(
            f"report folder {text} is a symbolic link; fitdyn replaces report folders whole "
            "and will not replace a link or its target: give the real folder path"
        )
    if _inside(cwd, real) or real == os.path.dirname(real):
        raise OutputError(
            f"report folder {text} is the current folder (or holds it); give a new folder "
            "name such as report/"
        )


# ----------------------------------------------------------------------------------
# signals
# ----------------------------------------------------------------------------------
class Terminated(SystemExit):
    """Raised in the main thread when SIGTERM or SIGHUP arrives."""


@contextmanager
def exit_on_signals() -> Iterator[None]:
    """Within the block, SIGTERM and SIGHUP raise :class:`Terminated` (exit 128+n).

    Cleanup code (``finally``, ``except BaseException``) then runs as for Ctrl-C: the
    temporary files are removed and worker pools are stopped.  Outside the main
    thread this does nothing.
    """
    saved: dict[int, Any] = {}

    def handler(signum: int, frame: Any) -> None:
        raise Terminated(128 + signum)

    for sig in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)):
        if sig is None:
            continue
        try:
            saved[sig] = signal.signal(sig, handler)
        except (ValueError, OSError):  # not the main thread
            pass
    try:
        yield
    finally:
        for sig, old in saved.items():
            try:
                signal.signal(sig, old)
            except (ValueError, OSError, TypeError):
                pass


@contextmanager
def numerical_guard(source: str | None, method: str, what: str = "the matrix") -> Iterator[None]:
    """Turn an unexpected numerical failure inside an estimator into an
    :class:`~fitdyn.errors.EstimationError` with what to do.

    Errors fitdyn raises on purpose pass through unchanged; so do Ctrl-C and
    ``MemoryError``.  What is caught -- ``LinAlgError``, ``OverflowError``,
    ``FloatingPointError``, ``ZeroDivisionError`` and a ``ValueError`` from NaN
    inputs to a library -- is a defect of the estimator on extreme data; the message
    names the exception so it can be reported.
    """
    from fitdyn.errors import EstimationError

    try:
        yield
    except FitdynError:
        raise
    except (
        np.linalg.LinAlgError,
        OverflowError,
        FloatingPointError,
        ZeroDivisionError,
        ValueError,
    ) as exc:
        where = f"{source}: " if source else ""
        raise EstimationError(
            f"{where}the '{method}' method could not compute {what} from these data "
            f"({type(exc).__name__}: {exc}); the values may be too extreme or too few: "
            "try another --method, rescale the channels, or check the recording"
        ) from exc
