"""Many recordings at once: one fit per file, one results table.

:func:`batch` finds the recordings (paths, folders, glob patterns), fits each one with
:func:`fitdyn.analysis.fit` -- the very code path of a single fit -- in this process
or in a pool of worker processes (or on a Dask cluster), and gathers one row per
file into a pandas DataFrame.  A file that cannot be fitted does not stop the batch:
its row says ``status == "error"`` and why.  Every input file has exactly one row.

Reproducibility: each file's seed is derived from the master seed and the file's
position in the sorted list of inputs (``numpy.random.SeedSequence(seed).spawn``), so
the table is the same whatever the number of workers, the backend or the chunking,
and ``fitdyn.fit(file, seed=row.seed, ...)`` gives that row's numbers again.

Only the table rows travel back from the workers (never the fitted objects), so the
memory of the calling process grows with the number of files, not with their size.
"""

from __future__ import annotations

import glob
import logging
import os
import sys
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fitdyn.errors import FitdynError, InputError, ReportError

if TYPE_CHECKING:  # imported where used, so that `import fitdyn` stays fast
    from concurrent.futures import Executor

    import pandas as pd

__all__ = [
    "batch",
    "find_sources",
    "file_seeds",
    "json_names",
    "write_table",
    "journal_path",
    "summary",
    "verdict_columns",
    "SUFFIXES",
    "BACKENDS",
]

#: File kinds taken from a folder (case-insensitive suffixes).
SUFFIXES: tuple[str, ...] = (".csv", ".tsv", ".txt", ".xlsx", ".parquet")

#: Where the fits run when ``workers > 1`` (or always, for ``"dask"``).
BACKENDS: tuple[str, ...] = ("process", "dask")

#: Environment variables that cap the threads of the linear-algebra libraries.
_THREAD_VARS = (
    "OPENBLAS_NUM_THREADS",
    "OMP_NUM_THREADS",
    "MKL_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)

#: Columns of every table, in order.
BASE_COLUMNS: tuple[str, ...] = (
    "file",
    "status",
    "message",
    "seed",
    "method",
    "samples",
    "trajectories",
    "channel_1",
    "channel_2",
    "time_unit",
    "a11",
    "a12",
    "a21",
    "a22",
    "equilibrium_1",
    "equilibrium_2",
    "trace",
    "determinant",
    "discriminant",
    "eigenvalue_1_real",
    "eigenvalue_1_imag",
    "eigenvalue_2_real",
    "eigenvalue_2_imag",
    "label",
    "stability",
)

#: Columns of the verdict and the adequacy checks, right after the point estimate's
#: ``label`` and ``stability`` in every table; then one ``check_<name>`` column per
#: check (:func:`verdict_columns`).
VERDICT_COLUMNS: tuple[str, ...] = (
    "verdict_stability",
    "verdict_label",
    "verdict_candidates",
    "not_reliable",
    "checks_warn",
    "checks_fail",
)

#: What the verdict columns say when no uncertainty analysis was made (bootstrap 0).
NOT_ASSESSED = "not assessed"

#: Separator of the joined verdict and check columns (labels contain no ``;``).
LIST_SEPARATOR = "; "

#: Columns added when intervals were asked for (``bootstrap > 0`` or ``asymptotic``).
UNCERTAINTY_COLUMNS: tuple[str, ...] = (
    "scheme",
    "failed_replicates",
    "trace_low",
    "trace_high",
    "determinant_low",
    "determinant_high",
    "max_real_part_low",
    "max_real_part_high",
    "eigenvalue_1_real_low",
    "eigenvalue_1_real_high",
    "eigenvalue_1_imag_low",
    "eigenvalue_1_imag_high",
    "eigenvalue_2_real_low",
    "eigenvalue_2_real_high",
    "eigenvalue_2_imag_low",
    "eigenvalue_2_imag_high",
    "p_stable",
    "label_probability",
    "likeliest_class",
    "likeliest_class_probability",
    "consistent_with",
)

#: Columns at the end of every table.
TAIL_COLUMNS: tuple[str, ...] = ("warning_count", "warnings")

_INT_COLUMNS = ("samples", "trajectories", "failed_replicates", "warning_count")

#: Separator of the joined ``warnings`` column (warnings may contain commas and ``;``).
WARNING_SEPARATOR = " | "

#: A file to fit: its index in the sorted list, path, seed and JSON path (or None).
Task = tuple[int, str, int, "str | None"]
Chunk = list[Task]

# keywords of fit() that batch() sets itself
_OWN = frozenset({"data", "method", "bootstrap", "confidence", "seed", "quiet"})


# ----------------------------------------------------------------------------------
# finding the recordings
# ----------------------------------------------------------------------------------
def _has_pattern(text: str) -> bool:
    return any(c in text for c in "*?[")


def _expand(item: str) -> list[str]:
    path = Path(item)
    if path.is_dir():
        found = [
            os.path.join(item, child.name)
            for child in sorted(path.iterdir())
            if child.is_file()
            and not child.name.startswith(".")
            and child.suffix.lower() in SUFFIXES
        ]
        if not found:
            raise InputError(
                f"the folder holds no {', '.join(SUFFIXES)} files; "
                "point to the recordings or use a pattern such as 'runs/*.dat'",
                source=item,
            )
        return found
    if path.is_file():
        return [item]
    if _has_pattern(item):
        found = [p for p in glob.glob(item, recursive=True) if os.path.isfile(p)]
        if not found:
            raise InputError(f"no file matches the pattern '{item}'; check the pattern")
        return found
    raise InputError("no such file or folder; check the path", source=item)


def find_sources(
    sources: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    *,
    exclude: Iterable[str | os.PathLike[str]] = (),
) -> list[str]:
    """The recordings named by paths, folders and glob patterns, sorted.

    Parameters
    ----------
    sources : path or iterable of paths
        Each item is a file (taken whatever its suffix), a folder (every
        ``.csv``, ``.tsv``, ``.txt``, ``.xlsx`` and ``.parquet`` file directly in it,
        hidden files excepted) or a glob pattern (``*``, ``?``, ``[...]``; ``**``
        reaches into sub-folders).
    exclude : iterable of paths
        Files never taken as inputs (the batch's own output table).

    Returns
    -------
    list of str
        Paths as written by the caller (joined for folders), sorted, each file once.

    Raises
    ------
    InputError
        When an item names nothing: a missing path, a pattern matching no file, a
        folder without recordings, or no item at all.
    """
    if isinstance(sources, str | os.PathLike):
        items = [os.fspath(sources)]
    else:
        items = [os.fspath(s) for s in sources]
    if not items:
        raise InputError("no recordings given; name files, folders or patterns")
    skip = {os.path.realpath(os.fspath(p)) for p in exclude}
    found: list[str] = []
    for item in items:
        found.extend(_expand(item))
    out: list[str] = []
    seen: set[str] = set()
    for path in sorted(found):
        real = os.path.realpath(path)
        if real in seen or real in skip:
            continue
        seen.add(real)
        out.append(path)
    if not out:
        raise InputError("no recordings left once the output table is set aside")
    return out


# ----------------------------------------------------------------------------------
# seeds and output names
# ----------------------------------------------------------------------------------
def file_seeds(seed: int | None, n: int) -> tuple[int, list[int]]:
    """One seed per file from a master seed and the file's position.

    File ``i`` gets the ``i``-th child of ``numpy.random.SeedSequence(seed)``
    (``spawn``), turned into a non-negative 63-bit integer that
    :func:`fitdyn.fit` (and ``fitdyn fit --seed``) accepts.  The child depends only on
    the master seed and ``i``, so the seeds do not depend on how the files are shared
    between workers.

    Parameters
    ----------
    seed : int or None
        Master seed; None draws fresh entropy (returned, so the run can be repeated).
    n : int
        Number of files.

    Returns
    -------
    master : int
        The master seed used (the drawn entropy when ``seed`` is None).
    seeds : list of int
        One seed per file.
    """
    if seed is not None:
        if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
            raise FitdynError(f"seed must be a whole number >= 0, got {seed!r}")
        seed = int(seed)
    root = np.random.SeedSequence(seed)
    master = int(root.entropy)  # type: ignore[arg-type]
    seeds = [int(child.generate_state(1, np.uint64)[0] >> np.uint64(1)) for child in root.spawn(n)]
    return master, seeds


def json_names(paths: Sequence[str], folder: str | os.PathLike[str]) -> list[Path]:
    """A distinct JSON file in ``folder`` for each recording.

    The name is the recording's file name without its suffix plus ``.json``; when two
    recordings share it (``a/run.csv`` and ``b/run.csv``, or ``run.csv`` and
    ``run.xlsx``), the later ones in the sorted list get ``-2``, ``-3``...  Names are
    compared without regard to case, so they stay distinct on any file system.

    Parameters
    ----------
    paths : sequence of str
        The recordings, in the batch's order.
    folder : path
        Where the JSON files go.

    Returns
    -------
    list of Path
    """
    folder = Path(folder)
    used: set[str] = set()
    out = []
    for p in paths:
        stem = Path(p).stem or "recording"
        name = f"{stem}.json"
        k = 2
        while name.casefold() in used:
            name = f"{stem}-{k}.json"
            k += 1
        used.add(name.casefold())
        out.append(folder / name)
    return out


# ----------------------------------------------------------------------------------
# one file (runs in the worker)
# ----------------------------------------------------------------------------------
def _one_line(text: str) -> str:
    from fitdyn.errors import shorten

    return shorten(str(text))


def _pair(iv: Any) -> tuple[float, float]:
    if iv is None:
        return float("nan"), float("nan")
    lo, hi = iv
    return float(lo), float(hi)


def verdict_columns() -> list[str]:
    """The verdict and check columns, in table order.

    :data:`VERDICT_COLUMNS`, then ``check_<name>`` for each check of
    :data:`fitdyn.diagnostics.NAMES` (imported here, so that ``import fitdyn`` stays
    fast).
    """
    from fitdyn.diagnostics import NAMES

    return list(VERDICT_COLUMNS) + [f"check_{name}" for name in NAMES]


def _verdict_row(res: Any) -> dict[str, str]:
    """The verdict and check cells of a successful fit.

    Without an uncertainty analysis (bootstrap 0 and no asymptotic intervals) the
    verdict's stability and label are ``"not assessed"``: the point estimate's own
    class stays in ``label`` and ``stability``, never repeated as if it were decided.
    """
    from fitdyn.diagnostics import NAMES

    v = res.verdict
    checks = {str(d.name): str(d.verdict) for d in res.diagnostics}
    row = {
        "verdict_stability": str(v.stability),
        "verdict_label": str(v.label) if v.assessed else NOT_ASSESSED,
        "verdict_candidates": LIST_SEPARATOR.join(v.candidates),
        "not_reliable": LIST_SEPARATOR.join(name for name, _ in v.not_reliable),
        "checks_warn": LIST_SEPARATOR.join(n for n, r in checks.items() if r == "warn"),
        "checks_fail": LIST_SEPARATOR.join(n for n, r in checks.items() if r == "fail"),
    }
    for name in NAMES:
        row[f"check_{name}"] = checks.get(name, "")
    return row


def _fit_row(res: Any) -> dict[str, Any]:
    """The table row of a successful fit (``res`` is a :class:`fitdyn.analysis.Fit`)."""
    rec = res.recording
    A = np.asarray(res.matrix, dtype=float)
    eq = res.equilibrium
    lam = res.eigenvalues
    row: dict[str, Any] = {
        "status": "ok",
        "message": "",
        "method": res.method,
        "samples": int(rec.n_samples),
        "trajectories": int(rec.n_trajectories),
        "channel_1": rec.channels[0],
        "channel_2": rec.channels[1],
        "time_unit": rec.time_unit,
        "a11": float(A[0, 0]),
        "a12": float(A[0, 1]),
        "a21": float(A[1, 0]),
        "a22": float(A[1, 1]),
        "equilibrium_1": float("nan") if eq is None else float(eq[0]),
        "equilibrium_2": float("nan") if eq is None else float(eq[1]),
        "trace": res.trace,
        "determinant": res.determinant,
        "discriminant": res.discriminant,
        "eigenvalue_1_real": float(lam[0].real),
        "eigenvalue_1_imag": float(lam[0].imag),
        "eigenvalue_2_real": float(lam[1].real),
        "eigenvalue_2_imag": float(lam[1].imag),
        "label": res.label,
        "stability": res.stability,
        **_verdict_row(res),
        "warning_count": len(res.warnings),
        "warnings": WARNING_SEPARATOR.join(_one_line(w) for w in res.warnings),
    }
    unc = res.uncertainty
    if unc is not None:
        iv = unc.intervals
        row["scheme"] = unc.scheme
        row["failed_replicates"] = int(unc.failed_replicates)
        for name in ("trace", "determinant", "max_real_part"):
            row[f"{name}_low"], row[f"{name}_high"] = _pair(iv.get(name))
        for part in ("real", "imag"):
            bounds = iv.get(f"eigenvalue_{part}")
            for k in range(2):
                lo, hi = _pair(None if bounds is None else bounds[k])
                row[f"eigenvalue_{k + 1}_{part}_low"] = lo
                row[f"eigenvalue_{k + 1}_{part}_high"] = hi
        probs = unc.class_probabilities
        row["p_stable"] = float(unc.p_stable)
        # boundary labels (center, star...) have no probability of their own
        row["label_probability"] = float(probs[res.label]) if res.label in probs else np.nan
        if probs:
            best, p = unc.verdict()
            row["likeliest_class"] = best
            row["likeliest_class_probability"] = float(p)
        row["consistent_with"] = ", ".join(unc.consistent_with)
    return row


def _fit_file(task: Task, options: dict[str, Any]) -> dict[str, Any]:
    """Fit one file; never raises for a bad file (the row carries the error)."""
    index, path, seed, json_path = task
    row: dict[str, Any] = {"index": index, "file": path, "seed": seed}
    try:
        from fitdyn.analysis import fit

        res = fit(path, seed=seed, quiet=True, **options)
    except FitdynError as exc:
        row.update(status="error", message=_one_line(str(exc)))
        return row
    except OSError as exc:
        where = exc.filename or path
        row.update(status="error", message=_one_line(f"{where}: {exc.strerror or exc}"))
        return row
    except MemoryError:
        row.update(status="error", message="internal error: out of memory while fitting")
        return row
    except Exception as exc:  # a bug: recorded, never stops the batch
        row.update(
            status="error",
            message=_one_line(
                f"internal error: {type(exc).__name__}: {exc} (rerun fitdyn fit on this "
                "file with --debug for the traceback, and please report it)"
            ),
        )
        return row
    row.update(_fit_row(res))
    if json_path is not None:
        try:
            res.to_json(json_path)
            row["json_file"] = json_path
        except (OSError, ValueError, TypeError) as exc:
            row.update(
                status="error",
                message=_one_line(f"fitted, but {json_path} could not be written: {exc}"),
            )
    return row


def _fit_chunk(tasks: Chunk, options: dict[str, Any]) -> list[dict[str, Any]]:
    """Fit several files in one worker call (fewer round trips)."""
    return [_fit_file(task, options) for task in tasks]


def _watch_parent(parent: int, interval: float = 1.0) -> None:
    """End this process when ``parent`` is gone, even after a SIGKILL of the parent.

    On Linux the kernel sends SIGKILL to this process when its parent dies
    (``prctl(PR_SET_PDEATHSIG)``, through ctypes); everywhere a daemon thread also
    checks every ``interval`` seconds that the parent is still there (an orphan is
    adopted by another process, so its parent id changes) and exits at once if not.
    An orphaned worker therefore never goes on writing results.
    """
    import signal
    import threading
    import time

    if sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # 1 = PR_SET_PDEATHSIG
        except Exception:  # no libc prctl: the polling thread still watches
            pass

    def gone() -> bool:
        if os.getppid() != parent:
            return True
        try:
            os.kill(parent, 0)
        except ProcessLookupError:
            return True
        except OSError:
            pass
        return False

    if gone():
        os._exit(1)

    def watch() -> None:
        while True:
            time.sleep(interval)
            if gone():
                os._exit(1)

    threading.Thread(target=watch, name="fitdyn-parent-watch", daemon=True).start()


def _init_worker(parent: int | None = None) -> None:
    """Worker start-up: one linear-algebra thread, Ctrl-C left to the parent, and
    an end when the parent ends (:func:`_watch_parent`)."""
    import signal

    if parent is not None:
        _watch_parent(parent)
    for var in _THREAD_VARS:
        os.environ[var] = "1"
    try:  # libraries already loaded in this process (optional helper, if installed)
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except Exception:
        pass
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    except (ValueError, OSError):  # not the main thread of the worker
        pass


@contextmanager
def _one_thread_env() -> Iterator[None]:
    """Cap BLAS threads in processes started inside the block (they copy this env)."""
    saved = {var: os.environ.get(var) for var in _THREAD_VARS}
    for var in _THREAD_VARS:
        os.environ[var] = "1"
    try:
        yield
    finally:
        for var, value in saved.items():
            if value is None:
                os.environ.pop(var, None)
            else:
                os.environ[var] = value


# ----------------------------------------------------------------------------------
# running
# ----------------------------------------------------------------------------------
def _progress(total: int, quiet: bool) -> Any:
    disable = quiet or not (hasattr(sys.stderr, "isatty") and sys.stderr.isatty())
    if disable:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc="recordings", unit="file", leave=False, file=sys.stderr)


_DIED = (
    "internal error: the worker process fitting this file died (a crash in a compiled "
    "library, or the system stopped it for lack of memory); try fitdyn fit on this file "
    "alone, or fewer workers"
)
_NO_START = (
    "internal error: the worker processes could not start; rerun with workers=1 "
    "to fit in the calling process"
)


def _crashed(tasks: Chunk, reason: str) -> list[dict]:
    """Error rows for files whose worker stopped before reporting them."""
    return [
        {"index": i, "file": path, "seed": seed, "status": "error", "message": reason}
        for i, path, seed, _ in tasks
    ]


def _failed(exc: BaseException) -> str:
    return _one_line(f"internal error: {type(exc).__name__}: {exc}")


def _drive(
    executor: Executor,
    chunks: Sequence[Chunk],
    options: dict[str, Any],
    in_flight: int,
    done: Callable[[list[dict[str, Any]]], None],
    fn: Callable[[Chunk, dict[str, Any]], list[dict[str, Any]]],
    broken: tuple[type[BaseException], ...] = (),
) -> tuple[list[Chunk], list[Chunk]]:
    """Feed chunks to ``executor``, at most ``in_flight`` at a time, and report rows.

    Returns
    -------
    lost : list of chunks
        Chunks that were running when the executor broke (an exception in
        ``broken``); their files are not reported.
    unsent : list of chunks
        Chunks not handed out because the executor broke.
    """
    from collections import deque
    from concurrent.futures import FIRST_COMPLETED, wait

    pending: dict[Any, Chunk] = {}
    queue = deque(chunks)
    lost: list[Chunk] = []
    stop = False

    def feed() -> None:
        nonlocal stop
        while not stop and queue and len(pending) < in_flight:
            chunk = queue.popleft()
            try:
                pending[executor.submit(fn, chunk, options)] = chunk
            except broken:
                queue.appendleft(chunk)
                stop = True
            except Exception as exc:
                done(_crashed(chunk, _failed(exc)))

    try:
        feed()
        while pending:
            finished, _ = wait(list(pending), return_when=FIRST_COMPLETED)
            for fut in finished:
                chunk = pending.pop(fut)
                try:
                    rows = fut.result()
                except broken:
                    lost.append(chunk)
                    stop = True
                    continue
                except Exception as exc:
                    rows = _crashed(chunk, _failed(exc))
                done(rows)
            feed()
    except BaseException:
        for fut in pending:
            fut.cancel()
        raise
    return lost, list(queue)


def _check_spawnable() -> None:
    """Refuse early what fresh worker interpreters cannot do: re-import ``__main__``."""
    main = sys.modules.get("__main__")
    path = getattr(main, "__file__", None)
    if main is not None and getattr(main, "__spec__", None) is None and path:
        if not os.path.isfile(path):
            raise FitdynError(
                f"workers > 1 start fresh Python processes, which cannot import the "
                f"calling script '{path}' (read from standard input?); save the script "
                "as a file, or use workers=1"
            )


def _pool_round(
    chunks: Sequence[Chunk],
    options: dict[str, Any],
    workers: int,
    in_flight: int,
    done: Callable[[list[dict[str, Any]]], None],
    fn: Callable[[Chunk, dict[str, Any]], list[dict[str, Any]]],
) -> tuple[list[Chunk], list[Chunk]]:
    """One process pool over ``chunks`` until done or broken (see :func:`_drive`)."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    # "spawn": a fresh interpreter that reads the thread caps before numpy loads, and
    # the same behaviour on every platform
    ctx = multiprocessing.get_context("spawn")
    with _one_thread_env():
        ex = ProcessPoolExecutor(
            max_workers=workers,
            mp_context=ctx,
            initializer=_init_worker,
            initargs=(os.getpid(),),
        )
        try:
            result = _drive(ex, chunks, options, in_flight, done, fn, (BrokenProcessPool,))
        except BaseException:  # Ctrl-C: stop now, not after the files already handed out
            procs = list((getattr(ex, "_processes", None) or {}).values())
            ex.shutdown(wait=False, cancel_futures=True)
            for proc in procs:
                if proc.is_alive():
                    proc.terminate()
            raise
        ex.shutdown(wait=True)
    return result


def _run_pool(
    chunks: list[Chunk],
    options: dict[str, Any],
    workers: int,
    done: Callable[[list[dict[str, Any]]], None],
    fn: Callable[[Chunk, dict[str, Any]], list[dict[str, Any]]] = _fit_chunk,
) -> None:
    """Fit on a local process pool; a worker that dies costs only its own file.

    When a worker process dies (a crash in a compiled library, the system killing it
    for memory), the pool breaks and every file it was running is lost.  Those files
    are then fitted again one at a time in a one-worker pool, so that the file that
    kills its worker is found and recorded as an internal error, and the others get
    their results; the files not yet handed out go on in a fresh pool.
    """
    reported = [0]

    def counted(rows: list[dict[str, Any]]) -> None:
        reported[0] += len(rows)
        done(rows)

    todo: list[Chunk] = list(chunks)
    while todo:
        reported[0] = 0
        lost, todo = _pool_round(todo, options, workers, 2 * workers, counted, fn)
        singles = [[task] for chunk in lost for task in chunk]
        dead: list[Chunk] = []
        while singles:
            bad, singles = _pool_round(singles, options, 1, 1, counted, fn)
            dead += bad
        if reported[0] == 0:
            # not one file came back: the workers cannot start at all
            for chunk in dead + todo:
                done(_crashed(chunk, _NO_START))
            return
        for chunk in dead:
            done(_crashed(chunk, _DIED))


def _run_dask(chunks: list, options: dict[str, Any], workers: int, done: Callable) -> None:
    try:
        from distributed import Client, LocalCluster, default_client
    except ImportError:
        raise FitdynError(
            'the dask backend needs dask: pip install "fitdyn[dask]", '
            'or use backend="process" (--backend process)'
        ) from None
    try:
        client = default_client()
        own = None
    except ValueError:  # no client yet: start a local cluster for this batch
        # the worker processes start with Ctrl-C ignored (the terminal sends it to
        # the whole process group; only this process handles it, quietly)
        with _one_thread_env(), _sigint_ignored():
            cluster = LocalCluster(
                n_workers=workers,
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
                silence_logs=logging.ERROR,
            )
            client = Client(cluster)
        own = (client, cluster)
        try:  # the workers end with this process, SIGKILL included
            client.run(_watch_parent, os.getpid())
        except Exception:
            pass
    interrupted = False
    try:
        n = sum(w.get("nthreads", 1) for w in client.scheduler_info()["workers"].values())
        ex = client.get_executor(pure=False)
        try:
            _drive(ex, chunks, options, 2 * max(1, n), done, _fit_chunk)
        except BaseException:
            interrupted = True
            _quiet_dask()
            ex.shutdown(wait=False)
            raise
        ex.shutdown(wait=True)
    finally:
        if own is not None:
            if interrupted:
                _quiet_dask()
            for thing in own:
                try:
                    thing.close()
                except BaseException:  # closing after Ctrl-C: nothing left to save
                    if not interrupted:
                        raise


@contextmanager
def _sigint_ignored() -> Iterator[None]:
    """Ignore SIGINT inside the block (main thread only), so child processes started
    there inherit it ignored."""
    import signal

    try:
        old = signal.signal(signal.SIGINT, signal.SIG_IGN)
    except (ValueError, OSError):
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, old)


def _quiet_dask() -> None:
    """No log lines or tracebacks from Dask while it is stopped after Ctrl-C."""
    for name in ("distributed", "tornado", "asyncio"):
        logging.getLogger(name).setLevel(logging.CRITICAL + 1)


# ----------------------------------------------------------------------------------
# the table
# ----------------------------------------------------------------------------------
def _columns(uncertainty: bool, json: bool) -> list[str]:
    cols = list(BASE_COLUMNS) + verdict_columns()
    if uncertainty:
        cols += UNCERTAINTY_COLUMNS
    cols += TAIL_COLUMNS
    if json:
        cols.append("json_file")
    return cols


def _table(rows: list[dict[str, Any]], columns: list[str]) -> pd.DataFrame:
    import pandas as pd

    frame = pd.DataFrame.from_records(rows, columns=columns)
    for col in _INT_COLUMNS:
        if col in frame:
            frame[col] = frame[col].astype("Int64")
    frame["seed"] = frame["seed"].astype("int64")
    return frame


def _check_output(path: Path) -> None:
    """Refuse an output that cannot be written now, before hours of fitting."""
    if path.is_dir():
        raise ReportError(
            "is a folder; give a file name such as results.csv", source=os.fspath(path)
        )
    if path.suffix.lower() == ".parquet":
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise ReportError(
                'writing .parquet tables needs pyarrow: pip install "fitdyn[parquet]", '
                "or write .csv",
                source=os.fspath(path),
            ) from None
    _check_folder(path.parent, f"cannot write the table {os.fspath(path)}")


def _check_folder(folder: Path, what: str) -> None:
    import tempfile

    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=folder):
            pass
    except OSError as exc:
        raise ReportError(
            f"{what}: {os.fspath(folder)} is not a writable folder "
            f"({exc.strerror or exc}); choose another place"
        ) from None


def write_table(table: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write a results table atomically: parquet for a ``.parquet`` suffix, else CSV.

    Parameters
    ----------
    table : pandas.DataFrame
        What :func:`batch` returned.
    path : path
        Destination; a reader never sees a half-written file.  In CSV, text cells a
        spreadsheet would run as a formula get a leading ``'``
        (:func:`fitdyn.atomic.inert_frame`).

    Returns
    -------
    Path
    """
    from fitdyn.atomic import write_csv_frame, write_with

    path = Path(path)
    if path.suffix.lower() == ".parquet":
        return write_with(path, lambda p: table.to_parquet(p, index=False))
    return write_csv_frame(path, table)


def _counts(column: pd.Series) -> str:
    counts = column.value_counts()
    return ", ".join(f"{k} {v}" for k, v in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))


def _verdict_summary(ok: pd.DataFrame, confidence: Any) -> list[str]:
    """Lines on the verdicts and the failed checks of the fitted rows."""
    if "verdict_stability" not in ok:
        return []
    lines = []
    stab = ok["verdict_stability"].fillna("")
    assessed = ok[(stab != NOT_ASSESSED) & (stab != "")]
    unassessed = int((stab == NOT_ASSESSED).sum())
    if len(assessed):
        level = f"{100 * float(confidence):.0f} %" if confidence is not None else "the"
        lines.append(
            f"verdict at the {level} level, stability: {_counts(assessed['verdict_stability'])}"
        )
        lines.append(f"verdict at the {level} level, class: {_counts(assessed['verdict_label'])}")
    if unassessed:
        lines.append(
            f"verdict not assessed for {unassessed} of {len(ok)} (no uncertainty analysis: "
            "bootstrap 0; the classes above are point estimates with no confidence; "
            "rerun with --bootstrap 500 for a verdict)"
        )
    flagged = ok["not_reliable"].fillna("")
    n_bad = int((flagged != "").sum())
    if n_bad:
        lines.append(
            f"not reliable (an adequacy check failed) for {n_bad} of {len(ok)}; "
            "see the 'not_reliable' and 'check_*' columns"
        )
    return lines


def summary(table: pd.DataFrame, out: str | os.PathLike[str] | None = None) -> str:
    """A few lines about a results table: counts, classes, where it went, the caution.

    Parameters
    ----------
    table : pandas.DataFrame
        What :func:`batch` returned.
    out : path, optional
        Where the table was written.

    Returns
    -------
    str
    """
    from fitdyn.analysis import CAUTION

    n = len(table)
    ok = table[table["status"] == "ok"]
    failed = n - len(ok)
    lines = [f"{len(ok)} of {n} recordings fitted, {failed} failed"]
    if len(ok):
        counts = ok["label"].value_counts()
        ordered = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
        width = max(len(str(k)) for k, _ in ordered)
        lines.append("equilibrium classes (point estimates):")
        lines += [f"  {k:<{width}}  {v}" for k, v in ordered]
        if "p_stable" in ok:
            sure = int((ok["p_stable"] >= 0.95).sum())
            lines.append(f"P(stable) >= 0.95 for {sure} of {len(ok)}")
        lines += _verdict_summary(ok, table.attrs.get("confidence"))
    if table.attrs.get("bootstrap") and "seed" in table.attrs:
        lines.append(
            f"master seed {table.attrs['seed']} (each file's own seed is in the 'seed' column)"
        )
    if failed:
        lines.append("failed files have status 'error' and the reason in the 'message' column")
    if out is not None:
        lines.append(f"table written to {os.fspath(out)}")
    lines.append(CAUTION)
    return "\n".join(lines)


# ----------------------------------------------------------------------------------
# resuming: the journal beside the table
# ----------------------------------------------------------------------------------
def journal_path(out: str | os.PathLike[str]) -> Path:
    """Where :func:`batch` keeps the journal of the table ``out``
    (``.<name>.fitdyn-journal.jsonl`` beside it)."""
    out = Path(out)
    return out.with_name(f".{out.name}.fitdyn-journal.jsonl")


def _file_digest(path: str) -> str:
    import hashlib

    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    except OSError as exc:  # the fit will report it; never reuse a row for it
        return f"unreadable:{exc.errno}"
    return h.hexdigest()


class _Journal:
    """One line of JSON per finished file, appended (and flushed to disk) as each
    file finishes, so that an interrupted or killed batch loses at most the files
    in progress.

    The first line records the options and the master seed; a row is reused on a
    later run only when the options, the file's path and content (SHA-256) and its
    seed are all unchanged.  Rows of internal errors (a crash, a worker that died)
    are never reused, nor fitted rows journaled before the verdict columns existed
    (they are fitted again; an older error row is reused, its new columns empty).  A
    torn last line (a kill in mid-write) is ignored.
    """

    VERSION = 1

    def __init__(
        self,
        out: Path,
        fit_options: dict[str, Any],
        json_dir: str | os.PathLike[str] | None,
        seed: int | None,
    ) -> None:
        import hashlib
        import json

        from fitdyn import __version__

        self.path = journal_path(out)
        spec = {
            "fitdyn": __version__,
            "options": fit_options,
            "json_dir": None if json_dir is None else os.path.realpath(os.fspath(json_dir)),
        }
        text = json.dumps(spec, sort_keys=True, default=repr)
        self.options = hashlib.sha256(text.encode()).hexdigest()
        self.seed = seed
        self.master: int | None = None
        self.rows: dict[str, dict[str, Any]] = {}
        self._lines = 0  # row lines read, torn and superseded ones included
        self._fh: Any = None
        self._load()

    def _load(self) -> None:
        import json

        try:
            lines = self.path.read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError):
            return
        if not lines:
            return
        try:
            head = json.loads(lines[0])
        except ValueError:
            return
        if not isinstance(head, dict) or head.get("journal") != self.VERSION:
            return
        if head.get("options") != self.options:
            return
        if self.seed is not None and head.get("master") != self.seed:
            return
        self.master = head.get("master")
        self._lines = len(lines) - 1
        for line in lines[1:]:
            try:
                entry = json.loads(line)
                self.rows[str(entry["key"])] = dict(entry["row"])
            except (ValueError, KeyError, TypeError):
                continue  # a torn line from a killed run

    def key(self, path: str, seed: int) -> str:
        import hashlib

        ident = f"{os.path.realpath(path)}\0{_file_digest(path)}\0{seed}"
        return hashlib.sha256(ident.encode("utf-8", "surrogateescape")).hexdigest()

    def reuse(self, key: str, json_path: str | None) -> dict[str, Any] | None:
        row = self.rows.get(key)
        if row is None or str(row.get("message", "")).startswith("internal error"):
            return None
        if row.get("status") == "ok" and "verdict_stability" not in row:
            return None  # journaled before the verdict columns: fitted again, not left blank
        if json_path is not None and row.get("status") == "ok":
            if row.get("json_file") != json_path or not os.path.isfile(json_path):
                return None
        return dict(row)

    def start(self, master: int) -> None:
        """Open the journal for appending; a new one when nothing could be reused."""
        import json

        from fitdyn.atomic import write_text

        head = {"journal": self.VERSION, "options": self.options, "master": master}
        if self.master != master:  # nothing to reuse: a fresh journal
            self.rows = {}
            write_text(self.path, json.dumps(head) + "\n")
            self.master = master
        elif self._lines != len(self.rows):  # compact: drop torn and superseded lines
            body = "".join(
                json.dumps({"key": k, "row": r}, default=_json_value) + "\n"
                for k, r in self.rows.items()
            )
            write_text(self.path, json.dumps(head) + "\n" + body)
        self._fh = open(self.path, "a+", encoding="utf-8")
        self._fh.seek(0, os.SEEK_END)
        if self._fh.tell() > 0:
            self._fh.seek(self._fh.tell() - 1)
            last = self._fh.read(1)
            self._fh.seek(0, os.SEEK_END)
            if last != "\n":  # a torn line: end it so the next entry is whole
                self._fh.write("\n")

    def add(self, key: str, row: dict[str, Any]) -> None:
        import json

        if self._fh is None:
            return
        self._fh.write(json.dumps({"key": key, "row": row}, default=_json_value) + "\n")
        self._fh.flush()
        try:
            os.fsync(self._fh.fileno())
        except OSError:
            pass

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None


def _json_value(obj: Any) -> Any:
    if hasattr(obj, "item"):
        return obj.item()
    return str(obj)


# ----------------------------------------------------------------------------------
# the entry point
# ----------------------------------------------------------------------------------
def _check_options(options: dict[str, Any]) -> None:
    import inspect

    from fitdyn.analysis import fit
    from fitdyn.importer import read

    allowed = (set(inspect.signature(fit).parameters) | set(inspect.signature(read).parameters)) - {
        "data",
        "source",
        "read_options",
    }
    allowed -= _OWN
    unknown = sorted(set(options) - allowed)
    if unknown:
        raise FitdynError(
            f"unknown option(s) {', '.join(unknown)}; batch() takes the keywords of "
            "fitdyn.fit and fitdyn.read"
        )


def batch(
    sources: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    *,
    out: str | os.PathLike[str] | None = None,
    json_dir: str | os.PathLike[str] | None = None,
    workers: int = 1,
    backend: str = "process",
    chunk: int | None = None,
    method: str = "auto",
    bootstrap: int = 0,
    confidence: float = 0.95,
    seed: int | None = None,
    quiet: bool = False,
    **options: Any,
) -> pd.DataFrame:
    """Fit many recordings and gather one row per file in a table.

    Each file goes through :func:`fitdyn.fit` with the same options; a file that
    cannot be read or fitted gets ``status == "error"`` and the reason in
    ``message`` (an unforeseen failure is prefixed ``"internal error:"``) and the
    batch goes on.  Every input file has exactly one row, in the sorted order.

    Parameters
    ----------
    sources : path, folder, glob pattern, or an iterable of them
        See :func:`find_sources`.  The output table itself is never an input.
    out : path, optional
        Write the table there atomically: parquet for a ``.parquet`` suffix, CSV
        otherwise.  Checked before any fitting starts.
    json_dir : path, optional
        Write each successful fit's full JSON result (``Fit.to_json``, schema
        ``fitdyn/1``) there, one file per recording named after it (see
        :func:`json_names`); the table's ``json_file`` column gives each name.
    workers : int
        Processes fitting at once (1: in this process).  With more, the fits run in
        fresh worker processes (``spawn``) with one BLAS thread each; a script that
        calls ``batch`` with ``workers > 1`` must guard its top level with
        ``if __name__ == "__main__":``.
    backend : {"process", "dask"}
        ``"process"``: a local process pool.  ``"dask"``: the current Dask client, or
        a local Dask cluster of ``workers`` single-threaded processes (needs
        ``pip install "fitdyn[dask]"``; ``json_dir`` must then be a folder every
        worker can reach).
    chunk : int, optional
        Files per task sent to a worker (default: a few, from the number of files
        and workers).  The results do not depend on it.
    method : str
        Estimator, as for :func:`fitdyn.fit` (default ``"auto"``).
    bootstrap : int
        Bootstrap replicates per file.  The default 0 is a speed choice for many
        files: no intervals, and the verdict columns say ``"not assessed"`` (unless
        ``asymptotic=True``); ask for 500 or more for a verdict at ``confidence``.
    confidence : float
        Confidence level of the intervals.
    seed : int, optional
        Master seed; file ``i`` of the sorted list gets the seed in the table's
        ``seed`` column (see :func:`file_seeds`).  None draws a fresh one, kept in
        ``table.attrs["seed"]``.
    quiet : bool
        No progress bar (there is one only when stderr is a terminal).
    **options
        Any other keyword of :func:`fitdyn.fit` (``equilibrium``, ``scheme``,
        ``interval``, ``margin``, ``asymptotic``, ``settings``...) or of
        :func:`fitdyn.read` (``time``, ``channels``, ``trajectory``, ``outliers``...),
        applied to every file.

    Returns
    -------
    pandas.DataFrame
        One row per file.  Columns: ``file``, ``status`` (``"ok"``/``"error"``),
        ``message``, ``seed``, ``method``, ``samples``, ``trajectories``,
        ``channel_1``, ``channel_2``, ``time_unit``, ``a11``..``a22``,
        ``equilibrium_1``, ``equilibrium_2``, ``trace``, ``determinant``,
        ``discriminant``, ``eigenvalue_k_real``/``_imag`` (k = 1, 2, sorted as in
        :class:`fitdyn.Fit`), ``label``, ``stability`` (these two: the point
        estimate, no confidence attached); the verdict at ``confidence``
        (:attr:`fitdyn.Fit.verdict`): ``verdict_stability`` (stable, unstable,
        undetermined, or not assessed without intervals), ``verdict_label`` (a class,
        undetermined, or not assessed), ``verdict_candidates`` (joined by ``"; "``);
        the adequacy checks (:attr:`fitdyn.Fit.diagnostics`): ``not_reliable``
        (failed checks, joined by ``"; "``; empty when none), ``checks_warn``,
        ``checks_fail`` and ``check_<name>`` (pass, warn or fail) for each name of
        :data:`fitdyn.diagnostics.NAMES`; error rows leave all these empty; with
        intervals also
        ``scheme``, ``failed_replicates``, ``<name>_low``/``_high`` for trace,
        determinant, max_real_part and each eigenvalue's real and imaginary part,
        ``p_stable``, ``label_probability`` (the point label's bootstrap
        probability; empty for a boundary label), ``likeliest_class`` and its
        probability, ``consistent_with`` (boundary classes not excluded, joined by
        ``", "``); then ``warning_count``, ``warnings`` (joined by ``" | "``) and,
        with ``json_dir``, ``json_file``.  ``attrs`` holds the master seed, the
        settings and the caution that these are statistical estimates about a
        linearisation.

    Raises
    ------
    FitdynError
        Before any fitting, for bad arguments: no matching files, an output that
        cannot be written, unknown options, a backend that is not installed.
    """
    from fitdyn import __version__
    from fitdyn.analysis import CAUTION
    from fitdyn.estimators import METHODS

    if isinstance(workers, bool) or not isinstance(workers, int | np.integer) or workers < 1:
        raise FitdynError(f"workers must be a whole number >= 1, got {workers!r}")
    if backend not in BACKENDS:
        raise FitdynError(f"backend must be one of {', '.join(BACKENDS)}, got '{backend}'")
    if chunk is not None and (isinstance(chunk, bool) or not isinstance(chunk, int) or chunk < 1):
        raise FitdynError(f"chunk must be a whole number >= 1, got {chunk!r}")
    if method not in METHODS:
        raise FitdynError(f"unknown method '{method}'; choose one of: {', '.join(METHODS)}")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int | np.integer) or bootstrap < 0:
        raise FitdynError(f"bootstrap must be a whole number >= 0, got {bootstrap!r}")
    if not 0 < confidence < 1:
        raise FitdynError(f"confidence must be between 0 and 1, got {confidence}")
    _check_options(options)
    from fitdyn.safety import check_outputs, is_fitdyn_json

    out_path = None if out is None else Path(out)
    items = [sources] if isinstance(sources, str | os.PathLike) else list(sources)
    paths = find_sources(items)
    check_outputs(
        [("out", out_path), ("json_dir", json_dir)],
        inputs=paths,
        input_folders=[i for i in items if os.path.isdir(i)],
        folders=("json_dir",),
    )
    fit_options = dict(options, method=method, bootstrap=int(bootstrap), confidence=confidence)
    journal = None
    if out_path is not None:
        _check_output(out_path)
        journal = _Journal(out_path, fit_options, json_dir, seed)
        if seed is None and journal.master is not None:
            seed = journal.master  # resume with the interrupted run's seeds
    master, seeds = file_seeds(seed, len(paths))
    if json_dir is not None:
        _check_folder(Path(json_dir), "cannot write the JSON results")
        jpaths: list[str | None] = [os.fspath(p) for p in json_names(paths, json_dir)]
        for jp in jpaths:
            if jp is not None and os.path.lexists(jp) and not is_fitdyn_json(jp):
                raise ReportError(
                    f"{jp} exists and fitdyn did not write it; give json_dir (--json-dir) "
                    "an empty folder or one holding only earlier fitdyn results"
                )
    else:
        jpaths = [None] * len(paths)

    tasks = list(zip(range(len(paths)), paths, seeds, jpaths, strict=True))
    rows: list[dict[str, Any] | None] = [None] * len(tasks)
    keys: list[str] = []
    if journal is not None:
        journal.start(master)
        keys = [journal.key(path, s) for _, path, s, _ in tasks]
        for i, key in enumerate(keys):
            rows[i] = journal.reuse(key, jpaths[i])
        tasks = [task for task in tasks if rows[task[0]] is None]
    workers = int(min(workers, len(tasks)))
    if backend == "process" and workers > 1:
        _check_spawnable()
    workers = max(1, workers)
    if chunk is None:
        chunk = max(1, min(8, len(tasks) // (4 * workers)))
    chunks = [tasks[i : i + chunk] for i in range(0, len(tasks), chunk)]

    bar = _progress(len(rows), quiet)
    if bar is not None:
        bar.update(len(rows) - len(tasks))

    def done(new: list[dict[str, Any]]) -> None:
        for r in new:
            i = r.pop("index")
            rows[i] = r
            if journal is not None:
                journal.add(keys[i], r)
        if bar is not None:
            bar.update(len(new))

    try:
        if not chunks:
            pass  # every file's row came from the journal
        elif backend == "dask":
            _run_dask(chunks, fit_options, workers, done)
        elif workers == 1:
            for c in chunks:
                done(_fit_chunk(c, fit_options))
        else:
            _run_pool(chunks, fit_options, workers, done)
    finally:
        if bar is not None:
            bar.close()
        if journal is not None:
            journal.close()

    missing = [paths[i] for i, r in enumerate(rows) if r is None]
    if missing:  # cannot happen; never lose a file quietly
        raise RuntimeError(f"no result came back for {len(missing)} files, e.g. {missing[0]}")
    uncertain = bool(bootstrap) or bool(options.get("asymptotic"))
    table = _table(rows, _columns(uncertain, json_dir is not None))  # type: ignore[arg-type]
    table.attrs.update(
        {
            "fitdyn_version": __version__,
            "seed": master,
            "method": method,
            "bootstrap": int(bootstrap),
            "confidence": float(confidence),
            "caution": CAUTION,
        }
    )
    if out_path is not None:
        write_table(table, out_path)
    return table
