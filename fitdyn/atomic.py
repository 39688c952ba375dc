"""Atomic output: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and a failed write leaves any previous
file in place.

Temporary names carry fitdyn's own marker and the writing process's id
(``.<name>.fitdyn-part-<pid>-<random>``), so that one left behind by a run that was
killed outright (SIGKILL, a power cut) is recognisable: the next write into the same
folder removes every such entry whose process is gone (:func:`remove_stale`).  On
every other exit path (an exception, Ctrl-C, SIGTERM turned into an exception by
:func:`fitdyn.safety.exit_on_signals`) the temporary file is removed at once.

CSV written by fitdyn goes through :func:`inert_frame` / :func:`write_csv_frame`:
a text cell (header included) that a spreadsheet would run as a formula -- one that
starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return -- gets a leading
single quote, so it is shown as text.  Numbers are written as numbers.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

__all__ = [
    "write_text",
    "write_bytes",
    "write_with",
    "replace_dir",
    "remove_stale",
    "inert_text",
    "inert_frame",
    "write_csv_frame",
    "TEMP_MARK",
]

#: Marker in the name of every temporary file or folder fitdyn writes.
TEMP_MARK = ".fitdyn-part-"
_STALE = re.compile(r"^\..*\.fitdyn-(?:part|old)-(\d+)-[A-Za-z0-9_]+$")
#: First characters that make a spreadsheet read a cell as a formula.
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's live process
        return True
    except OSError:
        return True
    return True


def remove_stale(folder: str | os.PathLike) -> list[str]:
    """Remove fitdyn's temporary entries left in ``folder`` by processes now gone.

    Only entries whose name carries fitdyn's temporary marker and the id of a
    process that no longer exists are removed; anything else is left alone.

    Parameters
    ----------
    folder : path-like
        The folder to tidy.

    Returns
    -------
    list of str
        Names removed.
    """
    removed: list[str] = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        m = _STALE.match(entry.name)
        if m is None or int(m.group(1)) == os.getpid() or _alive(int(m.group(1))):
            continue
        try:
            if entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path, ignore_errors=True)
            else:
                os.unlink(entry.path)
            removed.append(entry.name)
        except OSError:
            pass
    return removed


def _prefix(name: str) -> str:
    return f".{name}{TEMP_MARK}{os.getpid()}-"


def write_with(path: str | os.PathLike, writer: Callable[[Path], None]) -> Path:
    """Call ``writer(tmp_path)`` and move the result onto ``path`` atomically.

    Parameters
    ----------
    path : path-like
        Final location.
    writer : callable
        Writes the content to the temporary path it is given.

    Returns
    -------
    Path
        The final path.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    remove_stale(path.parent)
    fd, tmp = tempfile.mkstemp(prefix=_prefix(path.name), suffix="", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        writer(tmp_path)
        os.chmod(tmp_path, 0o666 & ~_umask())
        os.replace(tmp_path, path)
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise
    return path


def write_text(path: str | os.PathLike, text: str, encoding: str = "utf-8") -> Path:
    """Write text atomically."""
    return write_with(path, lambda p: p.write_text(text, encoding=encoding))


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write bytes atomically."""
    return write_with(path, lambda p: p.write_bytes(data))


def replace_dir(path: str | os.PathLike, builder: Callable[[Path], None]) -> Path:
    """Build a folder in a temporary sibling and swap it in only on success.

    Parameters
    ----------
    path : path-like
        Final folder; an existing one is replaced only when ``builder`` succeeds.
        The caller decides whether an existing folder may be replaced at all
        (:mod:`fitdyn.report` checks its manifest first).
    builder : callable
        Fills the temporary folder it is given.
    """
    path = Path(path)
    if not path.name or path.name in (".", ".."):
        raise ValueError(f"replace_dir needs a folder with a name, got {os.fspath(path)!r}")
    path.parent.mkdir(parents=True, exist_ok=True)
    remove_stale(path.parent)
    tmp = Path(tempfile.mkdtemp(prefix=_prefix(path.name), suffix="", dir=path.parent))
    try:
        os.chmod(tmp, 0o777 & ~_umask())
        builder(tmp)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    try:
        if path.exists():
            old = Path(
                tempfile.mkdtemp(prefix=f".{path.name}.fitdyn-old-{os.getpid()}-", dir=path.parent)
            )
            os.replace(path, old)
        os.replace(tmp, path)
    except BaseException:
        if old is not None and not path.exists():
            os.replace(old, path)
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return path


# ----------------------------------------------------------------------------------
# spreadsheet-safe CSV
# ----------------------------------------------------------------------------------
def inert_text(value: Any) -> Any:
    """``value`` with a leading single quote when it is text a spreadsheet would run.

    Text starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return gets a
    ``'`` in front; every other value (numbers included) is returned unchanged.
    """
    if isinstance(value, str) and value.startswith(FORMULA_START):
        return "'" + value
    return value


def inert_frame(frame: Any) -> Any:
    """A copy of a DataFrame whose text cells and column names are inert (see
    :func:`inert_text`); numeric columns are untouched and stay numbers."""
    import pandas as pd

    out = frame.copy()
    for col in out.columns:
        s = out[col]
        if pd.api.types.is_object_dtype(s.dtype) or pd.api.types.is_string_dtype(s.dtype):
            out[col] = s.map(inert_text)
    out.columns = [inert_text(str(c)) for c in out.columns]
    return out


def write_csv_frame(path: str | os.PathLike, frame: Any, **to_csv: Any) -> Path:
    """Write a DataFrame as spreadsheet-safe CSV, atomically (no index by default)."""
    safe = inert_frame(frame)
    to_csv.setdefault("index", False)
    return write_with(path, lambda p: safe.to_csv(p, **to_csv))
