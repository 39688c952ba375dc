"""Atomic output: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and a failed write leaves any previous
file in place.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

__all__ = ["write_text", "write_bytes", "write_with", "replace_dir"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


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
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
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
    builder : callable
        Fills the temporary folder it is given.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    try:
        os.chmod(tmp, 0o777 & ~_umask())
        builder(tmp)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if path.exists():
        old = path.with_name(f".{path.name}.old-{os.getpid()}")
        os.replace(path, old)
    try:
        os.replace(tmp, path)
    except BaseException:
        if old is not None:
            os.replace(old, path)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return path
