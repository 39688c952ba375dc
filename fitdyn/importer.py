"""Read a two-channel recording from a file, a data frame or arrays, and clean it.

:func:`read` is the only public entry point.  It returns a
:class:`~fitdyn.recording.Recording` whose :class:`~fitdyn.recording.CleaningLog`
accounts for every input row: each row is *kept* (possibly flagged), *dropped* with a
reason, or *merged* into another row that repeats its timestamp.  The identity
``kept + dropped + merged == input rows`` always holds.  The source is only read,
never written.

Row numbers in the log are, for text files, the 1-based line number in the file
(header and comment lines counted, so an editor opens the file at that line); for
spreadsheets, the sheet's row number; for data frames, the index label (or the
0-based position when the index is not made of unique integers); for arrays, the
0-based position.  Blank lines and ``#`` comment lines are not data rows.

Reasons used in the log
-----------------------
==========================  ======================================================
``missing trajectory id``   the trajectory column is empty on this row (dropped)
``missing time``            the time cell is empty (dropped)
``unparseable time``        the time cell is neither a number nor a timestamp
``missing value``           a channel cell is empty or ``NA``/``NaN``/``null``...
``non-numeric value``       a channel cell is text that is not a number
``non-finite value``        a channel or time cell is ``inf`` (or overflows)
``duplicate row``           same trajectory, time and values as an earlier row
``repeated timestamp``      same trajectory and time as an earlier row but other
                            values: *merged* (averaged into the earliest such row)
``outlier``                 flagged by the Hampel identifier; a *flag* on a kept
                            row, or the reason of a drop with ``outliers="drop"``
==========================  ======================================================
"""

from __future__ import annotations

import codecs
import csv
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fitdyn.errors import ColumnError, InputError, TimeError, TooFewSamplesError
from fitdyn.recording import DROPPED, KEPT, MERGED, CleaningLog, Recording, RowFate

__all__ = ["read", "REASONS"]

# -- reasons -------------------------------------------------------------------------
R_MISSING_ID = "missing trajectory id"
R_MISSING_TIME = "missing time"
R_BAD_TIME = "unparseable time"
R_MISSING = "missing value"
R_NON_NUMERIC = "non-numeric value"
R_NON_FINITE = "non-finite value"
R_DUPLICATE = "duplicate row"
R_REPEATED = "repeated timestamp"
R_OUTLIER = "outlier"

#: Every reason the importer writes into the cleaning log; index 0 means "none".
REASONS: tuple[str | None, ...] = (
    None,
    R_MISSING_ID,
    R_MISSING_TIME,
    R_BAD_TIME,
    R_MISSING,
    R_NON_NUMERIC,
    R_NON_FINITE,
    R_DUPLICATE,
    R_REPEATED,
    R_OUTLIER,
)
_CODE = {r: i for i, r in enumerate(REASONS)}

# Cell codes of a parsed numeric column.
_OK, _MISS, _BAD, _INF = 0, 1, 2, 3

#: Cell texts read as an empty cell (compared in lower case, after stripping).
MISSING_TOKENS = frozenset(
    ["", "na", "n/a", "#n/a", "nan", "null", "none", "nil", "missing", "-", "--", "?"]
)

#: Header names recognised as the time column, best first (normalised: lower case,
#: '_' and '-' read as spaces).  Names that imply a unit map to it.
_TIME_NAMES: dict[str, str | None] = {
    "time": None,
    "t": None,
    "elapsed time": None,
    "time elapsed": None,
    "elapsed": None,
    "seconds": "s",
    "secs": "s",
    "sec": "s",
    "minutes": "min",
    "mins": "min",
    "hours": "h",
    "hrs": "h",
    "days": "d",
    "timestamp": None,
    "time stamp": None,
    "datetime": None,
    "date time": None,
    "date": None,
}
_TIME_SUFFIX = re.compile(r"^(?:time|t) (ms|s|sec|secs|min|mins|h|hr|hrs|d|days)$")
_SUFFIX_UNIT = {"sec": "s", "secs": "s", "mins": "min", "hr": "h", "hrs": "h", "days": "d"}

#: Header names recognised as a trajectory (replicate) id column, best first.
_TRAJECTORY_NAMES = (
    "trajectory",
    "traj",
    "trajectory id",
    "run",
    "run id",
    "replicate",
    "rep",
    "replicate id",
    "experiment",
    "series",
    "batch",
    "id",
)

#: Bookkeeping columns (e.g. written by Recording.to_frame) never chosen as channels
#: automatically.
_BOOKKEEPING = frozenset(["source row", "outlier", "segment", "index", "unnamed: 0", "row"])

#: Seconds per unit, for timestamps and durations converted to a declared unit.
_SECONDS_PER = {"ms": 1e-3, "s": 1.0, "min": 60.0, "h": 3600.0, "d": 86400.0}

_COMMA_DECIMAL = re.compile(r"[+-]?\d+,\d+(?:[eE][+-]?\d+)?")
_DOT_DECIMAL = re.compile(r"[+-]?\d*\.\d+(?:[eE][+-]?\d+)?")
_NUMBERISH = re.compile(r"[+-]?(?:\d+[.,]?\d*|[.,]\d+)(?:[eE][+-]?\d+)?")
#: what a duration cell must contain: a clock colon or a unit word
_DURATIONISH = re.compile(r"[:A-Za-z]")

_UNIT_PATTERNS = (
    re.compile(r"^(?P<name>.*?\S)\s*\[(?P<unit>[^\[\]]*)\]$"),
    re.compile(r"^(?P<name>.*?\S)\s*\((?P<unit>[^()]*)\)$"),
    re.compile(r"^(?P<name>[^/]*?\S)\s*/\s*(?P<unit>[^/\s]{1,12})$"),
)

#: A spreadsheet error value at the start of a line is a data cell, not a comment.
_SHEET_ERROR = re.compile(r"#(?:N/A|VALUE!|DIV/0!|REF!|NAME\?|NUM!|NULL!)", re.IGNORECASE)

#: Choices of ``read(time_jumps=...)``.
TIME_JUMPS = ("split", "refuse", "sort")
#: A backward step in file order is a local shuffle when fewer than this many rows
#: lie on either side of it (earlier rows later in time, later rows earlier in time).
SHUFFLE_ROWS = 3

_SEP_NAMES = {"\t": "tab", ";": "';'", ",": "','", "|": "'|'", None: "whitespace"}


def _norm(name: str) -> str:
    """Lower case, '_' and '-' as spaces, spaces collapsed."""
    return " ".join(name.lower().replace("_", " ").replace("-", " ").split())


def split_unit(header: str) -> tuple[str, str | None]:
    """Split a header such as ``temp [K]``, ``temp (K)`` or ``temp/K`` into name and unit.

    Parameters
    ----------
    header : str
        A column header.

    Returns
    -------
    name : str
        The bare name (the whole header when no unit is found).
    unit : str or None
        The unit, or ``None``.
    """
    h = " ".join(str(header).split())
    for pat in _UNIT_PATTERNS:
        m = pat.match(h)
        if m:
            unit = m.group("unit").strip()
            return m.group("name").strip(), (unit or None)
    return h, None


# ------------------------------------------------------------------------------------
# Loaded table
# ------------------------------------------------------------------------------------
@dataclass
class _Column:
    """One input column: header, bare name, unit and raw cells."""

    header: str
    name: str
    unit: str | None
    kind: str  # "number", "object", "datetime", "timedelta", "bool"
    data: Any  # ndarray (number/object/bool) or pd.Series (datetime/timedelta)
    text: bool = False  # every cell is a str (text files)
    unnamed: bool = False  # the header cell was empty
    _numbers: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)


@dataclass
class _Table:
    """A loaded table before cleaning."""

    source: str
    columns: list[_Column]
    rows: np.ndarray  # int64 row labels
    notes: list[str]
    decimal_comma: bool = False

    @property
    def n(self) -> int:
        return int(self.rows.shape[0])

    def headers(self) -> str:
        return ", ".join(f"'{c.header}'" for c in self.columns) or "(none)"

    def numbers(self, col: _Column) -> tuple[np.ndarray, np.ndarray]:
        """Float values and cell codes (_OK/_MISS/_BAD/_INF) of a column (cached)."""
        if col._numbers is None:
            col._numbers = _parse_numbers(col, self.decimal_comma)
        return col._numbers

    def is_numeric(self, col: _Column) -> bool:
        """Whether most non-empty cells of a column are numbers."""
        if col.kind not in ("number", "object"):
            return False
        _, code = self.numbers(col)
        present = int(np.count_nonzero(code != _MISS))
        numeric = int(np.count_nonzero((code == _OK) | (code == _INF)))
        return numeric > 0 and 2 * numeric >= present


def _make_columns(headers: Sequence[str], datas: Sequence[Any], kinds: Sequence[str]) -> list:
    """Columns with unique headers, parsed names and units."""
    cols: list[_Column] = []
    seen: dict[str, int] = {}
    for k, (h, d, kind) in enumerate(zip(headers, datas, kinds, strict=True)):
        h = " ".join(str(h).split()) if h is not None else ""
        unnamed = not h
        if unnamed:
            h = f"column {k + 1}"
        if h in seen:
            seen[h] += 1
            h = f"{h}.{seen[h]}"
        seen.setdefault(h, 0)
        name, unit = split_unit(h)
        cols.append(_Column(h, name, unit, kind, d, unnamed=unnamed))
    return cols


def _parse_numbers(col: _Column, decimal_comma: bool) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised conversion of a column to floats with a code per cell."""
    data = col.data
    n = len(data)
    if col.kind == "number":
        v = np.array(data, dtype=float)
        code = np.zeros(n, dtype=np.int8)
        code[np.isnan(v)] = _MISS
        code[np.isinf(v)] = _INF
        return v, code
    if col.kind != "object":
        return np.full(n, np.nan), np.full(n, _BAD, dtype=np.int8)
    s = pd.Series(data, dtype=object, copy=False)
    null = s.isna().to_numpy(dtype=bool)
    txt = s.where(~null, "").astype(str).str.strip()
    missing = null | txt.str.lower().isin(MISSING_TOKENS).to_numpy(dtype=bool)
    if decimal_comma:
        txt = txt.str.replace(",", ".", regex=False)
    v = pd.to_numeric(txt, errors="coerce")
    v = np.array(pd.Series(v).to_numpy(dtype=float, na_value=np.nan), dtype=float)
    if not col.text:
        # Booleans stored as objects (spreadsheets, frames) are not measurements.
        isbool = np.fromiter((isinstance(c, bool | np.bool_) for c in data), bool, n)
        v[isbool] = np.nan
    code = np.zeros(n, dtype=np.int8)
    code[np.isnan(v)] = _BAD
    code[missing] = _MISS
    code[np.isinf(v)] = _INF
    v[code != _OK] = np.nan
    return v, code


def _looks_decimal_comma(columns: list[_Column], sep: str | None) -> bool:
    """Whether text cells use a decimal comma (only when ',' is not the separator)."""
    if sep == ",":
        return False
    commas = dots = 0
    for col in columns:
        if col.kind != "object":
            continue
        sample = [c.strip() for c in col.data[:2000] if isinstance(c, str)]
        commas += sum(1 for c in sample if _COMMA_DECIMAL.fullmatch(c))
        dots += sum(1 for c in sample if _DOT_DECIMAL.fullmatch(c))
    return commas > 0 and commas >= dots


# ------------------------------------------------------------------------------------
# Loaders
# ------------------------------------------------------------------------------------
#: Largest file read by default (bytes); ``read(max_bytes=...)`` changes it.
MAX_BYTES = 1 << 30
#: Longest text line read by default (characters); ``read(max_line=...)`` changes it.
MAX_LINE = 100_000


def _size_text(n: int) -> str:
    for unit, k in (("GB", 1 << 30), ("MB", 1 << 20), ("kB", 1 << 10)):
        if n >= k:
            return f"{n / k:.1f} {unit}"
    return f"{n} bytes"


def _check_regular(path: Path, label: str, max_bytes: int) -> None:
    """Refuse what is not a regular file of at most ``max_bytes`` (never opens it)."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise InputError(
            "file not found; check the path and the current folder", source=label
        ) from None
    except OSError as exc:
        raise InputError(
            f"cannot be read ({exc.strerror}); check its permissions", source=label
        ) from None
    _check_stat(st, label, max_bytes)


def _check_stat(st: os.stat_result, label: str, max_bytes: int) -> None:
    import stat

    if stat.S_ISDIR(st.st_mode):
        raise InputError("is a folder, not a file; give the path of a data file", source=label)
    if not stat.S_ISREG(st.st_mode):
        kind = (
            "a pipe"
            if stat.S_ISFIFO(st.st_mode)
            else "a device"
            if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode)
            else "a socket"
            if stat.S_ISSOCK(st.st_mode)
            else "not a regular file"
        )
        raise InputError(
            f"is {kind}, not a regular file; save the data to a file and read that",
            source=label,
        )
    if st.st_size > max_bytes:
        raise InputError(
            f"is {_size_text(st.st_size)}, more than the limit of {_size_text(max_bytes)}; "
            "pass max_bytes=... (--max-bytes) to read it anyway",
            source=label,
        )


def _read_bytes(path: Path, label: str, max_bytes: int = MAX_BYTES) -> bytes:
    """The bytes of a regular file of at most ``max_bytes``.

    The file is opened without blocking (a pipe would wait for a writer forever)
    and checked on the open handle, so a device or a pipe is never read.
    """
    _check_regular(path, label, max_bytes)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as exc:
        raise InputError(
            f"cannot be read ({exc.strerror}); check its permissions", source=label
        ) from None
    try:
        _check_stat(os.fstat(fd), label, max_bytes)
        chunks = []
        total = 0
        while True:
            block = os.read(fd, 1 << 20)
            if not block:
                break
            total += len(block)
            if total > max_bytes:  # grew while being read
                raise InputError(
                    f"is more than the limit of {_size_text(max_bytes)}; pass "
                    "max_bytes=... (--max-bytes) to read it anyway",
                    source=label,
                )
            chunks.append(block)
        return b"".join(chunks)
    except OSError as exc:
        raise InputError(
            f"cannot be read ({exc.strerror}); check its permissions", source=label
        ) from None
    finally:
        os.close(fd)


def _decode(raw: bytes, label: str, encoding: str | None) -> tuple[str, str]:
    """Text and the encoding used: UTF-8 (with or without BOM), UTF-16 with BOM,
    else latin-1."""
    if encoding is not None:
        try:
            return raw.decode(encoding), encoding
        except (UnicodeDecodeError, LookupError) as exc:
            raise InputError(
                f"cannot be decoded as {encoding} ({exc}); try encoding=None to detect it",
                source=label,
            ) from None
    if raw.startswith(codecs.BOM_UTF8):
        body = raw[len(codecs.BOM_UTF8) :]
        try:
            return body.decode("utf-8"), "utf-8 (with BOM)"
        except UnicodeDecodeError:
            return body.decode("latin-1"), "latin-1 (after a UTF-8 BOM)"
    if raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        try:
            return raw.decode("utf-16"), "utf-16"
        except UnicodeDecodeError:
            raise InputError(
                "starts like UTF-16 text but cannot be decoded; save it as UTF-8 CSV",
                source=label,
            ) from None
    if b"\x00" in raw[:4096]:
        raise InputError(
            "is not a text table (binary content); save it as CSV, .xlsx or .parquet "
            "with the matching file extension",
            source=label,
        )
    try:
        return raw.decode("utf-8"), "utf-8"
    except UnicodeDecodeError:
        return raw.decode("latin-1"), "latin-1"


def _sniff(lines: list[str]) -> str | None:
    """Pick the delimiter giving the same number (>= 2) of fields on most lines.

    Returns ``None`` for whitespace-separated text.
    """
    best: tuple[float, int] | None = None
    choice: str | None = None
    for d in ("\t", ";", ",", "|"):
        if not any(d in ln for ln in lines[:1]):
            continue
        try:
            records = list(csv.reader(lines, delimiter=d))
        except csv.Error:
            continue
        if not records:
            continue
        head = {len(records[0]), _width(records[0])}
        width = _width(records[0])
        if width < 2:
            continue
        data = records[1:] or records[:1]
        # a line agrees when its field count, with or without trailing empty
        # fields, is the header's
        share = sum(len(r) in head or _width(r) in head for r in data) / len(data)
        score = (share, width)
        if share >= 0.5 and (best is None or score > best):
            best, choice = score, d
    return choice


def _width(record: list[str]) -> int:
    """Number of fields without trailing empty ones."""
    k = len(record)
    while k > 0 and not record[k - 1].strip():
        k -= 1
    return k


#: A quoted cell may run over at most this many lines before the quote counts as damaged.
MAX_QUOTED_LINES = 2


def _csv_records(
    body: list[tuple[int, str]], sep: str, label: str = "", notes: list[str] | None = None
) -> tuple[list[list[str]], list[int]]:
    """Parse lines with the csv module, remembering the line each record starts on.

    A record that runs over more than :data:`MAX_QUOTED_LINES` lines is an unbalanced
    quote swallowing the lines after it: refused, naming the line; one over two lines
    is noted.
    """
    texts = [ln for _, ln in body]
    reader = csv.reader(texts, delimiter=sep, skipinitialspace=True)
    if not any('"' in ln for ln in texts):
        # no quotes, so no record spans lines: one record per line
        return list(reader), [i for i, _ in body]
    records: list[list[str]] = []
    starts: list[int] = []
    while True:
        k = reader.line_num
        try:
            rec = next(reader)
        except StopIteration:
            break
        records.append(rec)
        starts.append(body[k][0])
        span = reader.line_num - k
        if span > 1:
            first, last = body[k][0], body[reader.line_num - 1][0]
            if span > MAX_QUOTED_LINES:
                raise InputError(
                    f'a quote (") opened on line {first} is not closed before line {last}, '
                    f"so {span} lines would be read as one row; fix or remove that quote",
                    source=label or None,
                    row=first,
                )
            if notes is not None:
                notes.append(
                    f"line {first}: a quoted cell runs on to line {last} (read as one row)"
                )
    return records, starts


def _merge_unit_tokens(tokens: list[str]) -> list[str]:
    """Rejoin whitespace-split header tokens like ``time``, ``[s]`` into ``time [s]``."""
    out: list[str] = []
    for tok in tokens:
        if out and (tok[0] in "[(/" or out[-1].endswith("/")):
            out[-1] = f"{out[-1]} {tok}"
        else:
            out.append(tok)
    return out


def _looks_numeric(cells: list[str]) -> bool:
    cells = [c.strip() for c in cells if c.strip()]
    return bool(cells) and all(_NUMBERISH.fullmatch(c) for c in cells)


def _read_text(
    path: Path,
    label: str,
    sep: str | None,
    encoding: str | None,
    max_bytes: int = MAX_BYTES,
    max_line: int = MAX_LINE,
) -> _Table:
    raw = _read_bytes(path, label, max_bytes)
    if raw[:4] == b"PK\x03\x04":
        return _read_excel(path, label, None, max_bytes)
    if raw[:4] == b"PAR1":
        return _read_parquet(path, label, max_bytes)
    text, enc = _decode(raw, label, encoding)
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    long = next((i for i, ln in enumerate(lines, 1) if len(ln) > max_line), None)
    if long is not None:
        raise InputError(
            f"line {long} has {len(lines[long - 1])} characters, more than the limit of "
            f"{max_line} (a file without line breaks, or not a table?); pass "
            "max_line=... (--max-line) to read it anyway",
            source=label,
            row=long,
        )
    body: list[tuple[int, str]] = []
    last_comment: str | None = None
    for i, line in enumerate(lines, 1):
        s = line.strip()
        if not s:
            continue
        if s[0] == "#" and not _SHEET_ERROR.match(s):
            if not body:
                last_comment = s.lstrip("#").strip()
            continue
        body.append((i, line))
    if not body:
        raise InputError(
            "the file is empty (no header and no data rows); check that it is the right file",
            source=label,
        )
    notes = []
    if enc != "utf-8":
        notes.append(f"text decoded as {enc}")

    if sep is None:
        delim = _sniff([ln for _, ln in body[:51]])
    elif sep in (" ", "whitespace", r"\s+") or (sep.strip() == "" and sep != "\t"):
        delim = None
    else:
        delim = sep
    try:
        if delim is None:
            records = [ln.split() for _, ln in body]
            starts = [i for i, _ in body]
        else:
            records, starts = _csv_records(body, delim, label, notes)
    except csv.Error as exc:
        raise InputError(
            f"cannot be split into fields ({exc}); pass sep=... explicitly", source=label
        ) from None
    notes.append(f"fields separated by {_SEP_NAMES.get(delim, repr(delim))}")

    header = records[0]
    data = records[1:]
    data_rows = starts[1:]
    if _looks_numeric(header):
        # No header line: the first line is data; a last comment line may name columns.
        data, data_rows = records, starts
        width = _width(header)
        named = None
        if last_comment:
            cand = (
                last_comment.split()
                if delim is None
                else next(csv.reader([last_comment], delimiter=delim, skipinitialspace=True))
            )
            if delim is None and len(cand) != width:
                cand = _merge_unit_tokens(cand)
            if _width(cand) == width and not _looks_numeric(cand):
                named = cand[:width]
        if named is None:
            header = [f"column {k + 1}" for k in range(width)]
            notes.append("no header line: columns named 'column 1', 'column 2', ...")
        else:
            header = named
            notes.append("column names taken from the comment line above the data")
    if not data:
        raise InputError(
            "has a header but no data rows; add the measurements below the header",
            source=label,
            row=starts[0],
        )
    if delim is None and data:
        widths = [len(r) for r in data[:200]]
        common = max(set(widths), key=widths.count)
        if len(header) != common:
            merged = _merge_unit_tokens(header)
            if len(merged) == common:
                header = merged
    nh = _width(header)
    header = header[:nh]
    lens = list(map(len, data))
    if any(k != nh for k in lens):
        width = nh
        for i, k in enumerate(lens):
            if k > nh:
                rec = data[i]
                w = _width(rec)
                data[i] = rec[: max(w, nh)]
                width = max(width, w)
        if width > nh:
            header = header + [f"column {k + 1}" for k in range(nh, width)]
            notes.append(f"some rows have more fields than the header ({width} > {nh})")
        for i, rec in enumerate(data):
            if len(rec) < width:
                data[i] = rec + [""] * (width - len(rec))
        nh = width
    if nh == 0:
        raise ColumnError("no columns found; check the separator (sep=...)", source=label)
    cells = np.empty((len(data), nh), dtype=object)
    cells[:] = data
    columns = _make_columns(header, [cells[:, k] for k in range(nh)], ["object"] * nh)
    for col in columns:
        col.text = True
    table = _Table(label, columns, np.asarray(data_rows, dtype=np.int64), notes)
    table.decimal_comma = _looks_decimal_comma(columns, delim)
    if table.decimal_comma:
        notes.append("decimal commas read as decimal points")
    return table


def _read_excel(
    path: Path, label: str, sheet: str | int | None, max_bytes: int = MAX_BYTES
) -> _Table:
    try:
        import openpyxl
    except ImportError:
        raise InputError(
            'reading .xlsx files needs openpyxl: pip install "fitdyn[excel]"', source=label
        ) from None
    _check_regular(path, label, max_bytes)
    try:
        wb = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # openpyxl raises many types for broken files
        raise InputError(
            f"cannot be opened as an .xlsx workbook ({type(exc).__name__}: {exc}); "
            "save it again as .xlsx or CSV",
            source=label,
        ) from None
    try:
        names = wb.sheetnames
        if sheet is None:
            ws = wb.worksheets[0]
        elif isinstance(sheet, int) and not isinstance(sheet, bool):
            if not 0 <= sheet < len(names):
                raise InputError(
                    f"has no sheet number {sheet} (0-based); the sheets are: "
                    + ", ".join(f"'{s}'" for s in names),
                    source=label,
                )
            ws = wb.worksheets[sheet]
        else:
            match = [s for s in names if s == sheet] or [
                s for s in names if s.lower() == str(sheet).lower()
            ]
            if not match:
                raise InputError(
                    f"has no sheet '{sheet}'; the sheets are: "
                    + ", ".join(f"'{s}'" for s in names),
                    source=label,
                )
            ws = wb[match[0]]
        header: list[Any] | None = None
        header_row = 0
        rows: list[tuple] = []
        labels: list[int] = []
        for i, values in enumerate(ws.iter_rows(min_row=1, values_only=True), start=1):
            if all(v is None or (isinstance(v, str) and not v.strip()) for v in values):
                continue
            first = next(v for v in values if v is not None and str(v).strip())
            if (
                isinstance(first, str)
                and first.strip().startswith("#")
                and not _SHEET_ERROR.match(first.strip())
            ):
                continue
            if header is None:
                header, header_row = list(values), i
                continue
            rows.append(values)
            labels.append(i)
        title = ws.title
    finally:
        wb.close()
    label_sheet = f"{label} [sheet '{title}']"
    if header is None:
        raise InputError("the sheet is empty; check the sheet name (sheet=...)", source=label_sheet)
    if not rows:
        raise InputError(
            "has a header but no data rows; add the measurements below the header",
            source=label_sheet,
            row=header_row,
        )
    width = max(len(header), max(len(r) for r in rows))
    while (
        width > 0
        and header[width - 1] in (None, "")
        and all(len(r) < width or r[width - 1] is None for r in rows)
    ):
        width -= 1
    cells = np.empty((len(rows), width), dtype=object)
    for i, r in enumerate(rows):
        r = tuple(r[:width]) + (None,) * (width - len(r[:width]))
        cells[i] = r
    hdr = [header[k] if k < len(header) else None for k in range(width)]
    hdr = [h.strip() if isinstance(h, str) else (None if h is None else str(h)) for h in hdr]
    datas, kinds = [], []
    for k in range(width):
        col = cells[:, k]
        nonnull = [v for v in col if v is not None]
        if nonnull and all(hasattr(v, "year") and hasattr(v, "month") for v in nonnull):
            datas.append(pd.Series(pd.to_datetime(pd.Series(col, dtype=object))))
            kinds.append("datetime")
        else:
            datas.append(col)
            kinds.append("object")
    columns = _make_columns(hdr, datas, kinds)
    table = _Table(label_sheet, columns, np.asarray(labels, dtype=np.int64), [])
    table.decimal_comma = _looks_decimal_comma(columns, None)
    if table.decimal_comma:
        table.notes.append("decimal commas read as decimal points")
    return table


def _read_parquet(path: Path, label: str, max_bytes: int = MAX_BYTES) -> _Table:
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise InputError(
            'reading .parquet files needs pyarrow: pip install "fitdyn[parquet]"', source=label
        ) from None
    _check_regular(path, label, max_bytes)
    try:
        frame = pq.read_table(path).to_pandas()
    except Exception as exc:  # pyarrow raises several types for broken files
        raise InputError(
            f"cannot be read as parquet ({type(exc).__name__}: {exc}); check the file",
            source=label,
        ) from None
    return _frame_table(frame, label)


def _frame_table(frame: pd.DataFrame, label: str) -> _Table:
    headers, datas, kinds = [], [], []
    for key in frame.columns:
        s = frame[key]
        if isinstance(s, pd.DataFrame):  # duplicate labels
            s = s.iloc[:, 0]
        headers.append(" ".join(map(str, key)) if isinstance(key, tuple) else str(key))
        kind, data = _series_kind(s)
        kinds.append(kind)
        datas.append(data)
    if len(set(map(str, frame.columns))) != len(frame.columns):
        # Take duplicated labels position by position.
        datas = []
        kinds = []
        for k in range(frame.shape[1]):
            kind, data = _series_kind(frame.iloc[:, k])
            kinds.append(kind)
            datas.append(data)
    index = frame.index
    notes: list[str] = []
    if pd.api.types.is_integer_dtype(index.dtype) and index.is_unique:
        rows = np.asarray(index, dtype=np.int64)
    else:
        rows = np.arange(len(frame), dtype=np.int64)
        if not isinstance(index, pd.RangeIndex):
            notes.append("rows numbered by position (0-based): the index is not unique integers")
    columns = _make_columns(headers, datas, kinds)
    table = _Table(label, columns, rows, notes)
    table.decimal_comma = _looks_decimal_comma(columns, None)
    if table.decimal_comma:
        notes.append("decimal commas read as decimal points")
    return table


def _series_kind(s: pd.Series) -> tuple[str, Any]:
    dt = s.dtype
    if pd.api.types.is_bool_dtype(dt):
        return "bool", s.to_numpy(dtype=object)
    if pd.api.types.is_datetime64_any_dtype(dt):
        return "datetime", s.reset_index(drop=True)
    if pd.api.types.is_timedelta64_dtype(dt):
        return "timedelta", s.reset_index(drop=True)
    if pd.api.types.is_numeric_dtype(dt) and not isinstance(dt, pd.CategoricalDtype):
        return "number", s.to_numpy(dtype=float, na_value=np.nan)
    return "object", s.to_numpy(dtype=object)


def _array_table(source: tuple, channels: Any, trajectory: Any) -> tuple[_Table, Any]:
    label = "arrays"
    if len(source) == 2:
        t, x = source
        try:
            x = np.asarray(x)
        except Exception:
            raise InputError("(t, X): X cannot be made an array", source=label) from None
        if x.ndim != 2 or x.shape[1] != 2:
            hint = " (pass X.T)" if x.ndim == 2 and x.shape[0] == 2 else ""
            raise InputError(f"(t, X): X must have shape (n, 2), got {x.shape}{hint}", source=label)
        cols = [x[:, 0], x[:, 1]]
    elif len(source) == 3:
        t, a, b = source
        cols = [np.asarray(a), np.asarray(b)]
        if cols[0].ndim != 1 or cols[1].ndim != 1:
            raise InputError("(t, x1, x2): x1 and x2 must be 1-D arrays", source=label)
    else:
        raise InputError(
            f"a tuple source must be (t, X) or (t, x1, x2); got {len(source)} items",
            source=label,
        )
    t = np.asarray(t)
    if t.ndim != 1:
        raise InputError(f"t must be 1-D, got shape {t.shape}", source=label)
    n = t.shape[0]
    if any(c.shape[0] != n for c in cols):
        raise InputError(
            f"t has {n} entries but the channels have {cols[0].shape[0]}; give equal lengths",
            source=label,
        )
    if channels is None:
        names = ["x1", "x2"]
    else:
        names = _two_names(channels, label)
    frame = {"time": t, names[0]: cols[0], names[1]: cols[1]}
    traj = None
    if _is_array_like(trajectory):
        traj = "trajectory"
        frame[traj] = np.asarray(trajectory)
        if frame[traj].shape != (n,):
            raise InputError(
                f"trajectory must have one entry per sample ({n}), got shape {frame[traj].shape}",
                source=label,
            )
    try:
        df = pd.DataFrame(frame)
    except Exception as exc:
        raise InputError(f"cannot combine the arrays ({exc})", source=label) from None
    table = _frame_table(df, label)
    return table, ("time", names, traj)


def _two_names(channels: Any, label: str) -> list[str]:
    if isinstance(channels, str) or not isinstance(channels, Sequence) or len(channels) != 2:
        raise InputError(
            f"channels must name exactly two columns, e.g. channels=('x', 'y'); got {channels!r}",
            source=label,
        )
    return [str(c) for c in channels]


def _is_array_like(obj: Any) -> bool:
    return isinstance(obj, np.ndarray | pd.Series | list | tuple) and not isinstance(obj, str)


# ------------------------------------------------------------------------------------
# Column choice
# ------------------------------------------------------------------------------------
def _lookup(table: _Table, spec: Any, role: str) -> _Column:
    cols = table.columns
    if isinstance(spec, int | np.integer) and not isinstance(spec, bool):
        key = str(spec)
        if not any(c.header == key or c.name == key for c in cols):
            if 0 <= int(spec) < len(cols):
                return cols[int(spec)]
            raise ColumnError(
                f"no column number {spec} (0-based) for the {role}; the columns are: "
                f"{table.headers()}",
                source=table.source,
            )
        spec = key
    if not isinstance(spec, str):
        raise InputError(
            f"the {role} must be given as a column name, got {spec!r}", source=table.source
        )
    s = " ".join(spec.split())
    sname, sunit = split_unit(s)
    tests = (
        lambda c: c.header == s,
        lambda c: c.name == s,
        lambda c: c.header.lower() == s.lower(),
        lambda c: c.name.lower() == s.lower(),
        lambda c: sunit is not None and c.name.lower() == sname.lower() and c.unit == sunit,
    )
    for test in tests:
        hits = [c for c in cols if test(c)]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise ColumnError(
                f"matches several columns ({', '.join(repr(c.header) for c in hits)}); "
                "give the full header",
                source=table.source,
                column=spec,
            )
    raise ColumnError(
        f"no such column for the {role}; the columns are: {table.headers()}",
        source=table.source,
        column=spec,
    )


def _time_rank(col: _Column) -> tuple[int, str | None] | None:
    key = _norm(col.name)
    if key in _TIME_NAMES:
        return list(_TIME_NAMES).index(key), _TIME_NAMES[key]
    m = _TIME_SUFFIX.match(key)
    if m:
        unit = _SUFFIX_UNIT.get(m.group(1), m.group(1))
        return 0, unit
    return None


def _auto_trajectory(table: _Table) -> _Column | None:
    best: tuple[int, _Column] | None = None
    for col in table.columns:
        key = _norm(col.name)
        if key in _TRAJECTORY_NAMES:
            rank = _TRAJECTORY_NAMES.index(key)
            if best is None or rank < best[0]:
                best = (rank, col)
    return None if best is None else best[1]


def _bookkeeping(table: _Table, col: _Column, notes: list[str]) -> bool:
    """Whether a column is a row counter or bookkeeping, never a channel by default."""
    if _norm(col.name) in _BOOKKEEPING:
        notes.append(f"column '{col.header}' looks like bookkeeping: not taken as a channel")
        return True
    if col.unnamed:
        v, code = table.numbers(col)
        if np.all(code == _OK) and v.size > 1 and np.all(np.diff(v) == 1):
            notes.append(f"column '{col.header}' (no header) counts rows: not taken as a channel")
            return True
    return False


def _trajectory_ids(col: _Column) -> tuple[np.ndarray, np.ndarray]:
    """Trajectory ids as stripped strings and a mask of missing ids."""
    data = col.data
    n = len(data)
    if col.kind == "number":
        v = np.asarray(data, dtype=float)
        missing = ~np.isfinite(v)
        ids = np.empty(n, dtype=object)
        ok = ~missing
        integral = ok & (v == np.round(v)) & (np.abs(v) < 2**53)
        ids[integral] = [str(int(x)) for x in v[integral]]
        other = ok & ~integral
        ids[other] = [format(x, "g") for x in v[other]]
        ids[missing] = ""
        return ids, missing
    if col.kind in ("datetime", "timedelta"):
        s = pd.Series(data)
        missing = s.isna().to_numpy(dtype=bool)
        ids = s.astype(str).to_numpy(dtype=object)
        return ids, missing
    out = np.empty(n, dtype=object)
    for i, c in enumerate(data):
        if isinstance(c, str):
            out[i] = c.strip()
        elif c is None or (isinstance(c, float) and np.isnan(c)):
            out[i] = ""
        elif isinstance(c, float | np.floating) and float(c).is_integer():
            out[i] = str(int(c))
        else:
            out[i] = str(c).strip()
    low = pd.Series(out, dtype=object).str.lower()
    missing = low.isin(MISSING_TOKENS).to_numpy(dtype=bool)
    return out, missing


def _increasing(values: np.ndarray, code: np.ndarray, traj: np.ndarray) -> bool:
    ok = code == _OK
    v, tr = values[ok], traj[ok]
    if v.size < 2:
        return False
    same = tr[1:] == tr[:-1]
    return bool(same.any() and np.all(np.diff(v)[same] > 0))


@dataclass
class _Time:
    values: np.ndarray
    code: np.ndarray  # _OK, _MISS, _BAD, _INF
    unit: str | None
    origin: str | None
    kind: str  # "number", "timestamp", "duration"


def _parse_time(table: _Table, col: _Column, unit_hint: str | None, time_unit: str | None):
    """Times as floats: numbers, ISO-8601 timestamps (seconds from the earliest) or
    durations (seconds)."""
    n = table.n
    header_unit = col.unit or unit_hint
    if col.kind in ("number", "object"):
        v, code = table.numbers(col)
        present = np.count_nonzero(code != _MISS)
        numeric = np.count_nonzero((code == _OK) | (code == _INF))
        if present == 0:
            raise TimeError(
                "the time column is empty; fill it in or choose another with time=...",
                source=table.source,
                column=col.header,
            )
        if 2 * numeric >= present:
            unit = time_unit or header_unit
            return _Time(v, code, unit, None, "number")
    if col.kind == "datetime":
        stamps = pd.Series(col.data)
        text = None
    elif col.kind == "timedelta":
        d = pd.Series(col.data)
        secs = (d / pd.Timedelta(seconds=1)).to_numpy(dtype=float, na_value=np.nan)
        code = np.where(np.isnan(secs), _MISS, _OK).astype(np.int8)
        return _duration(secs, code, table, col, time_unit)
    else:
        s = pd.Series(col.data, dtype=object, copy=False)
        null = s.isna().to_numpy(dtype=bool)
        text = s.where(~null, "").astype(str).str.strip()
        missing = null | text.str.lower().isin(MISSING_TOKENS).to_numpy(dtype=bool)
        try:
            stamps = pd.to_datetime(
                text.where(~missing, None), errors="coerce", format="ISO8601", utc=True
            )
        except (ValueError, TypeError, OverflowError):
            stamps = pd.Series(pd.NaT, index=range(n), dtype="datetime64[ns, UTC]")
        good = stamps.notna().to_numpy(dtype=bool)
        present = int(np.count_nonzero(~missing))
        if 2 * int(np.count_nonzero(good)) < present:
            try:
                durations = pd.to_timedelta(text.where(~missing, None), errors="coerce")
            except (ValueError, TypeError, OverflowError):
                durations = pd.Series(pd.NaT, index=range(n), dtype="timedelta64[ns]")
            numeric_cells = np.asarray([bool(_NUMBERISH.fullmatch(c)) for c in text], dtype=bool)
            # pandas reads bare digit groups such as '1 2' as nanoseconds; a duration
            # cell must show a clock (00:01:30) or a unit (90 s, 1 day)
            formed = np.asarray([bool(_DURATIONISH.search(c)) for c in text], dtype=bool)
            dsec = np.array(
                (durations / pd.Timedelta(seconds=1)).to_numpy(dtype=float, na_value=np.nan)
            )
            dsec[numeric_cells | ~formed] = np.nan
            dgood = ~np.isnan(dsec)
            if 2 * int(np.count_nonzero(dgood)) >= present and dgood.any():
                code = np.full(n, _BAD, dtype=np.int8)
                code[dgood] = _OK
                code[missing] = _MISS
                return _duration(dsec, code, table, col, time_unit)
            bad = np.flatnonzero(~missing & ~good)
            example = text.iloc[bad[0]] if bad.size else ""
            raise TimeError(
                f"cannot be read as times (e.g. '{example}'): use numbers, ISO-8601 "
                "timestamps like 2024-03-01T12:00:00, or durations like 00:01:30; or "
                "choose another column with time=...",
                source=table.source,
                column=col.header,
                row=int(table.rows[bad[0]]) if bad.size else None,
            )
    if stamps.dt.tz is None:
        stamps = stamps.dt.tz_localize("UTC")
    good = stamps.notna().to_numpy(dtype=bool)
    code = np.full(n, _BAD, dtype=np.int8)
    code[good] = _OK
    if text is not None:
        code[missing & ~good] = _MISS
    else:
        code[~good] = _MISS
    if not good.any():
        raise TimeError(
            "no cell of the time column can be read as a time; use numbers or ISO-8601 timestamps",
            source=table.source,
            column=col.header,
        )
    origin = stamps[good].min()
    first = int(np.flatnonzero(good & (stamps == origin).to_numpy(dtype=bool))[0])
    secs = ((stamps - origin) / pd.Timedelta(seconds=1)).to_numpy(dtype=float, na_value=np.nan)
    origin_text = (
        str(text.iloc[first])
        if text is not None
        else pd.Timestamp(col.data.iloc[first]).isoformat()
    )
    unit = time_unit or "s"
    if unit not in _SECONDS_PER:
        raise InputError(
            f"time_unit={unit!r} cannot be applied to timestamps; use one of "
            + ", ".join(_SECONDS_PER),
            source=table.source,
            column=col.header,
        )
    secs = secs / _SECONDS_PER[unit]
    table.notes.append(f"timestamps converted to {unit} from {origin_text}")
    return _Time(secs, code, unit, origin_text, "timestamp")


def _duration(secs, code, table: _Table, col: _Column, time_unit: str | None) -> _Time:
    unit = time_unit or "s"
    if unit not in _SECONDS_PER:
        raise InputError(
            f"time_unit={unit!r} cannot be applied to durations; use one of "
            + ", ".join(_SECONDS_PER),
            source=table.source,
            column=col.header,
        )
    table.notes.append(f"durations converted to {unit}")
    return _Time(secs / _SECONDS_PER[unit], code, unit, None, "duration")


# ------------------------------------------------------------------------------------
# Public entry point
# ------------------------------------------------------------------------------------
def read(
    source: Any,
    time: str | int | None = None,
    channels: Sequence[str | int] | None = None,
    trajectory: str | int | bool | Sequence[Any] | None = None,
    *,
    time_unit: str | None = None,
    repeated_times: str = "average",
    outliers: str = "flag",
    outlier_window: int = 7,
    outlier_threshold: float = 3.5,
    gap_factor: float | None = 3.0,
    min_samples: int = 3,
    sheet: str | int | None = None,
    sep: str | None = None,
    decimal: str | None = None,
    encoding: str | None = None,
    time_jumps: str = "split",
    max_bytes: int = MAX_BYTES,
    max_line: int = MAX_LINE,
) -> Recording:
    """Read and clean a two-channel recording.

    Parameters
    ----------
    source : path, DataFrame, mapping, tuple of arrays or Recording
        A CSV / TSV / ``;``-separated / whitespace-separated text file (``.csv``,
        ``.tsv``, ``.txt``, ``.dat``...), an ``.xlsx`` workbook (needs openpyxl), a
        ``.parquet`` file (needs pyarrow), a pandas DataFrame (or a mapping of
        columns), a tuple ``(t, X)`` with ``X`` of shape ``(n, 2)`` (or
        ``(t, x1, x2)``), or a Recording (returned unchanged).
    time : str or int, optional
        The time column (full header, bare name without the unit, or 0-based
        position).  By default a column named like a time (``time``, ``t``,
        ``seconds``, ``timestamp``, ``date``...), else a date-time column, else the
        first numeric column that increases strictly.
    channels : pair of str or int, optional
        The two channel columns.  By default the two numeric columns left besides
        time and trajectory; required when there are more.  For arrays, the names of
        the two channels (default ``x1``, ``x2``).
    trajectory : str, int, False or array-like, optional
        The column with trajectory (replicate) ids in long format; found by name
        (``trajectory``, ``run``, ``replicate``, ``id``...) by default; ``False``
        for none.  For arrays and frames, one id per row may be given directly.
    time_unit : str, optional
        Unit of the time column; overrides the unit in the header.  Timestamps and
        durations are converted to it (``ms``, ``s``, ``min``, ``h``, ``d``;
        default ``s``).
    repeated_times : {"average", "refuse"}
        Rows of one trajectory with the same time but different values are averaged
        into the first of them (the others are logged as merged), or refused with a
        :class:`~fitdyn.errors.TimeError`.
    outliers : {"flag", "drop", "ignore"}
        Hampel identifier per channel and trajectory: flag the samples (kept), drop
        them, or skip the test.
    outlier_window : int
        Samples in the moving window (odd; an even number is rounded up).  The first
        and last ``outlier_window // 2`` samples of each trajectory are not tested.
    outlier_threshold : float
        A sample is an outlier when it is more than this many scaled MADs
        (1.4826 x median absolute deviation) from the window median (default 3.5:
        on white Gaussian noise about 0.08 % of samples are flagged, measured).
    gap_factor : float or None
        A step longer than ``gap_factor`` x the median step of its trajectory starts
        a new segment.  ``None`` marks no gaps.
    min_samples : int
        Fewest usable samples accepted per trajectory.
    sheet : str or int, optional
        Worksheet of an ``.xlsx`` file (name or 0-based number; default the first).
    sep : str, optional
        Field separator of a text file (default: sniffed); ``" "`` for whitespace.
    decimal : {".", ","}, optional
        Decimal mark of text cells (default: detected; a comma only when the
        separator is not a comma).
    encoding : str, optional
        Text encoding (default: UTF-8 with or without BOM, else latin-1).
    time_jumps : {"split", "refuse", "sort"}
        What to do when the time of a trajectory jumps back in file order by more
        than a local shuffle of a few rows (a clock hour repeated when daylight
        saving time ends, a logger's clock restarting, files joined together):
        ``"split"`` (default) makes each stretch between such jumps a trajectory
        of its own (named ``"<id> (part 2)"``...) and says so in the cleaning log;
        ``"refuse"`` raises a :class:`~fitdyn.errors.TimeError` naming the row;
        ``"sort"`` sorts the rows by time as for a local shuffle (repeated times
        are then merged).  A trajectory whose time runs backwards throughout is
        refused unless ``"sort"`` is given.
    max_bytes : int
        Largest file read (default 1 GiB); anything but a regular file (a pipe, a
        device, a folder) is always refused.
    max_line : int
        Longest line of a text file read (default 100000 characters).

    Returns
    -------
    Recording
        Cleaned samples with the cleaning log.

    Raises
    ------
    InputError, ColumnError, TimeError, TooFewSamplesError
        With a one-line message naming the file, column and row and what to do.
    """
    if isinstance(source, Recording):
        return source
    _check_options(
        repeated_times,
        outliers,
        outlier_window,
        outlier_threshold,
        gap_factor,
        min_samples,
        decimal,
    )
    if time_jumps not in TIME_JUMPS:
        raise InputError(f"time_jumps must be one of {', '.join(TIME_JUMPS)}, got {time_jumps!r}")
    for name, value in (("max_bytes", max_bytes), ("max_line", max_line)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
            raise InputError(f"{name} must be a whole number >= 1, got {value!r}")
    forced: tuple | None = None
    if isinstance(source, str | os.PathLike):
        path = Path(source)
        label = os.fspath(source)
        ext = path.suffix.lower()
        if ext in (".xlsx", ".xlsm"):
            table = _read_excel(path, label, sheet, max_bytes)
        elif ext == ".xls":
            raise InputError(
                "old .xls workbooks are not supported; save the sheet as .xlsx or CSV",
                source=label,
            )
        elif ext in (".parquet", ".pq"):
            table = _read_parquet(path, label, max_bytes)
        else:
            table = _read_text(path, label, sep, encoding, max_bytes, max_line)
    elif isinstance(source, pd.DataFrame):
        table = _frame_table(source, "DataFrame")
    elif isinstance(source, Mapping):
        try:
            frame = pd.DataFrame(dict(source))
        except Exception as exc:
            raise InputError(
                f"cannot make a table of the mapping ({exc})", source="mapping"
            ) from None
        table = _frame_table(frame, "mapping")
    elif isinstance(source, tuple):
        table, forced = _array_table(source, channels, trajectory)
    else:
        raise InputError(
            f"cannot read a {type(source).__name__}; pass a file path, a DataFrame, "
            "(t, X) arrays or a Recording"
        )
    if decimal is not None:
        was = table.decimal_comma
        table.decimal_comma = decimal == ","
        if was != table.decimal_comma:
            for col in table.columns:
                col._numbers = None
    if table.n == 0:
        raise InputError("has no data rows; check that it is the right table", source=table.source)
    if forced is not None:
        time, channels, trajectory = forced
        if trajectory is None:
            trajectory = False
    elif _is_array_like(trajectory) and not isinstance(trajectory, str):
        ids = np.asarray(trajectory)
        if ids.shape != (table.n,):
            raise InputError(
                f"trajectory ids must have one entry per row ({table.n}), got shape {ids.shape}",
                source=table.source,
            )
        name = "trajectory"
        while any(c.header == name for c in table.columns):
            name += " (given)"
        kind, data = _series_kind(pd.Series(ids))
        table.columns.append(_Column(name, name, None, kind, data))
        trajectory = name
    return _clean(
        table,
        time=time,
        channels=channels,
        trajectory=trajectory,
        time_unit=time_unit,
        repeated_times=repeated_times,
        outliers=outliers,
        outlier_window=int(outlier_window),
        outlier_threshold=float(outlier_threshold),
        gap_factor=gap_factor,
        min_samples=int(min_samples),
        time_jumps=time_jumps,
    )


def _check_options(repeated_times, outliers, window, threshold, gap_factor, min_samples, decimal):
    if repeated_times not in ("average", "refuse"):
        raise InputError(f"repeated_times must be 'average' or 'refuse', got {repeated_times!r}")
    if outliers not in ("flag", "drop", "ignore"):
        raise InputError(f"outliers must be 'flag', 'drop' or 'ignore', got {outliers!r}")
    if isinstance(window, bool) or not isinstance(window, int | np.integer) or window < 3:
        raise InputError(f"outlier_window must be an integer >= 3, got {window!r}")
    if not (isinstance(threshold, int | float) and np.isfinite(threshold) and threshold > 0):
        raise InputError(f"outlier_threshold must be a positive number, got {threshold!r}")
    if gap_factor is not None and not (
        isinstance(gap_factor, int | float) and gap_factor > 1 and not np.isnan(gap_factor)
    ):
        raise InputError(f"gap_factor must be a number > 1 or None, got {gap_factor!r}")
    if (
        isinstance(min_samples, bool)
        or not isinstance(min_samples, int | np.integer)
        or (min_samples < 1)
    ):
        raise InputError(f"min_samples must be an integer >= 1, got {min_samples!r}")
    if decimal not in (None, ".", ","):
        raise InputError(f"decimal must be '.', ',' or None, got {decimal!r}")


# ------------------------------------------------------------------------------------
# Cleaning
# ------------------------------------------------------------------------------------
def _clean(
    table: _Table,
    *,
    time,
    channels,
    trajectory,
    time_unit,
    repeated_times,
    outliers,
    outlier_window,
    outlier_threshold,
    gap_factor,
    min_samples,
    time_jumps="split",
) -> Recording:
    src = table.source
    n = table.n
    rows = table.rows
    notes = table.notes

    # -- trajectory column ----------------------------------------------------------
    tcol: _Column | None
    if trajectory is False:
        tcol = None
    elif trajectory is None or trajectory is True:
        tcol = _auto_trajectory(table)
    else:
        tcol = _lookup(table, trajectory, "trajectory")
    excluded_id: _Column | None = None  # an id column that differs on every row
    if tcol is not None:
        ids, missing_id = _trajectory_ids(tcol)
        present = ids[~missing_id]
        if trajectory is None and present.size > 1 and len(set(present.tolist())) == present.size:
            notes.append(
                f"column '{tcol.header}' differs on every row: not used as trajectory id "
                f"(pass trajectory='{tcol.header}' to use it)"
            )
            excluded_id, tcol = tcol, None
    if tcol is not None:
        codes = np.full(n, -1, dtype=np.int64)
        fac, uniq = pd.factorize(ids[~missing_id])
        codes[~missing_id] = fac
        names = tuple(str(u) for u in uniq)
    else:
        codes = np.zeros(n, dtype=np.int64)
        names = ("1",)
        missing_id = np.zeros(n, dtype=bool)

    # -- time column ----------------------------------------------------------------
    skip = {id(tcol), id(excluded_id)}
    time_hint: str | None = None
    if time is not None:
        xcol = _lookup(table, time, "time")
        rank = _time_rank(xcol)
        time_hint = rank[1] if rank else None
    else:
        ranked = [(r, c) for c in table.columns if id(c) not in skip and (r := _time_rank(c))]
        xcol = None
        if ranked:
            ranked.sort(key=lambda rc: rc[0][0])
            (best, time_hint), xcol = ranked[0]
            ties = [c.header for (r, _), c in ranked if r == best]
            if len(ties) > 1:
                raise ColumnError(
                    "several columns could be the time ("
                    + ", ".join(f"'{h}'" for h in ties)
                    + "); choose one with time=...",
                    source=src,
                )
        if xcol is None:
            dated = [
                c
                for c in table.columns
                if id(c) not in skip and c.kind in ("datetime", "timedelta")
            ]
            if dated:
                xcol = dated[0]
        if xcol is None:
            for c in table.columns:
                if id(c) in skip or not table.is_numeric(c):
                    continue
                v, code = table.numbers(c)
                if _increasing(v, code, codes):
                    xcol = c
                    notes.append(
                        f"column '{c.header}' taken as time (first column that increases strictly)"
                    )
                    break
        if xcol is None:
            if not any(table.is_numeric(c) for c in table.columns if id(c) not in skip):
                raise ColumnError(
                    f"no numeric columns (columns: {table.headers()}); a time column and two "
                    "numeric channels are needed; check the separator (sep=...) and the "
                    "decimal mark (decimal=...)",
                    source=src,
                )
            raise ColumnError(
                "no time column: none is named like a time (time, t, seconds, timestamp, "
                "date...) and no numeric column increases strictly; name it so or pass "
                f"time=... (columns: {table.headers()})",
                source=src,
            )
    if xcol is tcol:
        raise ColumnError(
            "cannot be both the time and the trajectory column", source=src, column=xcol.header
        )
    tm = _parse_time(table, xcol, time_hint, time_unit)
    if time_unit and xcol.unit and time_unit != xcol.unit and tm.kind == "number":
        notes.append(f"time unit '{time_unit}' used instead of '{xcol.unit}' from the header")

    # -- channels -------------------------------------------------------------------
    skip.add(id(xcol))
    if channels is not None:
        names2 = _two_names(channels, src)
        chans = [_lookup(table, c, "channel") for c in channels]
        for c in chans:
            if c is xcol or c is tcol:
                role = "time" if c is xcol else "trajectory"
                raise ColumnError(
                    f"cannot be both a channel and the {role} column; choose other channels",
                    source=src,
                    column=c.header,
                )
        if chans[0] is chans[1]:
            raise ColumnError(
                f"both channels name the same column ({names2}); give two different columns",
                source=src,
                column=chans[0].header,
            )
    else:
        numeric = [
            c
            for c in table.columns
            if id(c) not in skip and table.is_numeric(c) and not _bookkeeping(table, c, notes)
        ]
        if len(numeric) > 2:
            raise ColumnError(
                "more than two numeric columns could be the channels ("
                + ", ".join(f"'{c.header}'" for c in numeric)
                + "); choose two with channels=('a', 'b')",
                source=src,
            )
        if len(numeric) < 2:
            any_numeric = (
                any(table.is_numeric(c) for c in table.columns if c is not tcol)
                or tm.kind != "number"
            )
            if not numeric and not any_numeric:
                raise ColumnError(
                    f"no numeric columns (columns: {table.headers()}); check the separator "
                    "(sep=...) and the decimal mark (decimal=...)",
                    source=src,
                )
            found = ", ".join(f"'{c.header}'" for c in numeric) or "none"
            raise ColumnError(
                f"fewer than two numeric channels besides the time '{xcol.header}' "
                f"(found {found}; columns: {table.headers()}); two channels are needed, "
                "name them with channels=(...) or fix the non-numeric cells",
                source=src,
            )
        chans = numeric
    notes.insert(
        0,
        f"time '{xcol.header}', channels '{chans[0].header}' and '{chans[1].header}'"
        + (f", trajectories from '{tcol.header}'" if tcol is not None else ""),
    )
    v1, c1 = table.numbers(chans[0])
    v2, c2 = table.numbers(chans[1])
    t = tm.values

    # -- per-row reasons --------------------------------------------------------------
    reason = np.zeros(n, dtype=np.int8)
    where: dict[int, list[tuple[str, np.ndarray]]] = {}

    def mark(code: int, parts: list[tuple[str, np.ndarray]]) -> None:
        total = np.zeros(n, dtype=bool)
        for _, m in parts:
            total |= m
        sel = total & (reason == 0)
        reason[sel] = code
        if sel.any():
            where[code] = [(h, m & sel) for h, m in parts if (m & sel).any()]

    mark(_CODE[R_MISSING_ID], [(tcol.header if tcol else "", missing_id)])
    mark(_CODE[R_MISSING_TIME], [(xcol.header, tm.code == _MISS)])
    mark(_CODE[R_BAD_TIME], [(xcol.header, tm.code == _BAD)])
    mark(_CODE[R_MISSING], [(chans[0].header, c1 == _MISS), (chans[1].header, c2 == _MISS)])
    mark(_CODE[R_NON_NUMERIC], [(chans[0].header, c1 == _BAD), (chans[1].header, c2 == _BAD)])
    mark(
        _CODE[R_NON_FINITE],
        [
            (xcol.header, tm.code == _INF),
            (chans[0].header, c1 == _INF),
            (chans[1].header, c2 == _INF),
        ],
    )
    for code, parts in where.items():
        detail = "; ".join(f"column '{h}' first at row {int(rows[np.argmax(m)])}" for h, m in parts)
        notes.append(f"{REASONS[code]}: {int(np.count_nonzero(reason == code))} row(s) ({detail})")

    # -- trajectories that restart --------------------------------------------------
    timed = (codes >= 0) & (tm.code == _OK)
    if tcol is not None:
        _check_restarts(codes[timed], t[timed], rows[timed], names, src, tcol.header)
    elif time_jumps == "sort":
        _note_restart(t[timed], rows[timed], notes)
    if time_jumps != "sort":
        codes, names = _time_jumps(
            codes, names, t, timed, rows, time_jumps, src, xcol.header, tcol is not None, notes
        )

    # -- duplicates and repeated timestamps ------------------------------------------
    valid = np.flatnonzero(reason == 0)
    X = np.column_stack([v1, v2])
    order = valid[np.lexsort((valid, X[valid, 1], X[valid, 0], t[valid], codes[valid]))]
    oc, ot, ox = codes[order], t[order], X[order]
    same_time = np.zeros(order.size, dtype=bool)
    if order.size > 1:
        same_time[1:] = (oc[1:] == oc[:-1]) & (ot[1:] == ot[:-1])
    same_row = same_time.copy()
    if order.size > 1:
        same_row[1:] &= (ox[1:, 0] == ox[:-1, 0]) & (ox[1:, 1] == ox[:-1, 1])
    dups = order[same_row]
    reason[dups] = _CODE[R_DUPLICATE]
    if dups.size:
        notes.append(f"{R_DUPLICATE}: {dups.size} row(s), first at row {int(rows[dups.min()])}")
    keep = ~same_row
    order, oc, ot, ox = order[keep], oc[keep], ot[keep], ox[keep]
    starts = np.flatnonzero(
        np.r_[True, (oc[1:] != oc[:-1]) | (ot[1:] != ot[:-1])] if order.size else np.zeros(0, bool)
    )
    sizes = np.diff(np.r_[starts, order.size])
    rep = np.minimum.reduceat(order, starts) if order.size else np.zeros(0, np.int64)
    if np.any(sizes > 1):
        multi = np.flatnonzero(sizes > 1)
        if repeated_times == "refuse":
            g = multi[np.argmin(rep[multi])]
            members = np.sort(order[starts[g] : starts[g] + sizes[g]])
            raise TimeError(
                f"time {ot[starts[g]]:g} repeats with different values in rows "
                f"{int(rows[members[0]])} and {int(rows[members[1]])}"
                + (f" of trajectory '{names[oc[starts[g]]]}'" if tcol is not None else "")
                + "; fix the rows or pass repeated_times='average' to average them",
                source=src,
                column=xcol.header,
                row=int(rows[members[1]]),
            )
        merged_count = int(sizes[multi].sum() - multi.size)
        notes.append(
            f"{R_REPEATED}: {merged_count} row(s) averaged into {multi.size} earlier row(s) "
            "with the same time"
        )
    group = np.repeat(np.arange(starts.size), sizes)  # sample index of each row in order
    sample_of = np.full(n, -1, dtype=np.int64)
    sample_of[order] = group
    merged_rows = order[order != rep[group]]
    reason[merged_rows] = _CODE[R_REPEATED]
    sx = np.add.reduceat(ox, starts, axis=0) / sizes[:, None] if order.size else np.zeros((0, 2))
    exact = sizes == 1
    sx[exact] = ox[starts[exact]]
    st = ot[starts] if order.size else np.zeros(0)
    sc = oc[starts] if order.size else np.zeros(0, np.int64)

    # -- outliers -------------------------------------------------------------------
    flag = np.zeros(st.size, dtype=bool)
    if outliers != "ignore" and st.size:
        flag = _hampel(sx, sc, outlier_window // 2, outlier_threshold)
    if outliers == "drop" and flag.any():
        rows_out = np.flatnonzero((sample_of >= 0) & flag[np.maximum(sample_of, 0)])
        reason[rows_out] = _CODE[R_OUTLIER]
        notes.append(f"{R_OUTLIER}: {int(flag.sum())} sample(s) dropped (Hampel identifier)")
        keep_s = ~flag
        new_index = np.cumsum(keep_s) - 1
        sample_of = np.where(
            (sample_of >= 0) & keep_s[np.maximum(sample_of, 0)],
            new_index[np.maximum(sample_of, 0)],
            -1,
        )
        sx, st, sc, rep = sx[keep_s], st[keep_s], sc[keep_s], rep[keep_s]
        flag = np.zeros(st.size, dtype=bool)
    elif flag.any():
        notes.append(
            f"{R_OUTLIER}: {int(flag.sum())} sample(s) flagged and kept (Hampel identifier)"
        )

    # -- enough samples? ------------------------------------------------------------
    counts = np.bincount(sc, minlength=len(names)) if len(names) else np.zeros(0, int)
    if not len(names):
        raise TooFewSamplesError(
            f"no usable rows: every trajectory id is missing; fill in column "
            f"'{tcol.header}' or pass trajectory=False",
            source=src,
            column=tcol.header if tcol else None,
        )
    short = np.flatnonzero(counts < min_samples)
    if short.size:
        k = int(short[0])
        mine = codes == k
        lost = pd.Series(reason[mine & (reason > 0)]).map(lambda c: REASONS[c])
        lost_text = ", ".join(f"{cnt} {r}" for r, cnt in lost.value_counts(sort=False).items())
        where_rows = rows[mine]
        first_row = int(where_rows[0]) if where_rows.size else None
        if tcol is not None:
            what = f"trajectory '{names[k]}' has {int(counts[k])} usable sample(s)"
        else:
            what = f"only {int(counts[k])} usable sample(s)"
        raise TooFewSamplesError(
            f"{what}, at least {min_samples} needed"
            + (f" (rows dropped or merged: {lost_text})" if lost_text else "")
            + "; fix or remove those rows, or lower min_samples",
            source=src,
            column=tcol.header if tcol is not None else None,
            row=first_row,
        )

    # -- gaps -----------------------------------------------------------------------
    ns = st.size
    new_traj = np.r_[True, sc[1:] != sc[:-1]] if ns else np.zeros(0, bool)
    gap = np.zeros(ns, dtype=bool)
    if gap_factor is not None and ns > 1:
        steps = np.diff(st)
        inside = ~new_traj[1:]
        med = np.full(len(names), np.nan)
        bounds = np.r_[np.flatnonzero(new_traj), ns]
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):
            if b - a > 1:
                med[sc[a]] = np.median(np.diff(st[a:b]))
        limit = gap_factor * med[sc[1:]]
        gap[1:] = inside & (steps > limit)
        if gap.any():
            notes.append(
                f"{int(gap.sum())} gap(s): step longer than {gap_factor:g} x the median step of "
                "its trajectory; segments restart there"
            )
    segment = np.cumsum(new_traj | gap) - 1

    # -- log ------------------------------------------------------------------------
    status = np.where(reason == 0, 0, 1).astype(np.int8)
    status[reason == _CODE[R_REPEATED]] = 2
    flagged_rows = np.zeros(n, dtype=bool)
    if flag.any():
        flagged_rows[rep[flag]] = True
    status_names = (KEPT, DROPPED, MERGED)
    outlier_flag = (R_OUTLIER,)
    fates = tuple(
        RowFate(r, status_names[s], REASONS[c], outlier_flag if f else ())
        for r, s, c, f in zip(
            rows.tolist(), status.tolist(), reason.tolist(), flagged_rows.tolist(), strict=True
        )
    )
    log = CleaningLog(source=src, fates=fates, notes=tuple(notes))
    channel_names = [c.name for c in chans]
    if channel_names[0] == channel_names[1]:
        channel_names = [c.header for c in chans]
    return Recording(
        times=np.asarray(st, dtype=float),
        values=np.asarray(sx, dtype=float).reshape(-1, 2),
        trajectory=np.asarray(sc, dtype=np.int64),
        segment=np.asarray(segment, dtype=np.int64),
        outlier=flag,
        source_rows=np.asarray(rows[rep], dtype=np.int64),
        channels=(channel_names[0], channel_names[1]),
        units=(chans[0].unit, chans[1].unit),
        time_unit=tm.unit,
        trajectory_names=names,
        log=log,
        source=src,
        time_origin=tm.origin,
        source_columns={
            "time": xcol.header,
            "channels": [chans[0].header, chans[1].header],
            "trajectory": tcol.header if tcol is not None else None,
        },
    )


def _check_restarts(
    codes: np.ndarray,
    t: np.ndarray,
    rows: np.ndarray,
    names: tuple[str, ...],
    src: str,
    column: str,
) -> None:
    """Refuse an id whose rows come in separate, each time-ordered blocks whose times
    start again: two recordings sharing one id."""
    m = codes.size
    if m < 4:
        return
    starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
    if starts.size == len(np.unique(codes)):
        return  # every id in one block
    ends = np.r_[starts[1:], m]
    down = np.r_[np.diff(t) < 0, False]  # down[i]: t[i+1] < t[i]
    inner_down = np.add.reduceat(down.astype(np.int64), starts)
    # the step leaving a block is not inside it
    inner_down -= down[ends - 1].astype(np.int64)
    ordered = (inner_down == 0) & (ends - starts >= 2)
    last_block: dict[int, int] = {}
    for b, code in enumerate(codes[starts].tolist()):
        p = last_block.get(code)
        if p is not None and ordered[p] and ordered[b] and t[starts[b]] < t[ends[p] - 1]:
            raise TimeError(
                f"trajectory '{names[code]}' starts again (time {t[starts[b]]:g} after "
                f"{t[ends[p] - 1]:g} at row {int(rows[ends[p] - 1])}): two recordings seem "
                "to share this id; give each its own id",
                source=src,
                column=column,
                row=int(rows[starts[b]]),
            )
        last_block[code] = b


def _jumps_back(tk: np.ndarray) -> np.ndarray:
    """Positions ``i`` where time jumps back in file order by more than a local shuffle.

    Position ``i`` (``tk[i] < tk[i - 1]``) is a jump when the :data:`SHUFFLE_ROWS`
    rows before it are all later than ``tk[i]`` and the :data:`SHUFFLE_ROWS` rows
    from it on are all earlier than ``tk[i - 1]``: two stretches overlap in time, as
    when a clock hour repeats or a clock restarts.  A row or two out of place (a
    logger writing late) is a shuffle, sorted quietly.
    """
    m = tk.size
    s = SHUFFLE_ROWS
    if m < 2 * s:
        return np.zeros(0, dtype=np.int64)
    i = np.arange(s, m - s + 1)
    back = tk[i] < tk[i - 1]
    if not back.any():
        return np.zeros(0, dtype=np.int64)
    win = np.lib.stride_tricks.sliding_window_view(tk, s)  # win[j] = tk[j : j + s]
    before_min = win[i - s].min(axis=1)
    after_max = win[i].max(axis=1)
    jump = back & (before_min > tk[i]) & (after_max < tk[i - 1])
    return i[jump]


def _time_jumps(
    codes: np.ndarray,
    names: tuple[str, ...],
    t: np.ndarray,
    timed: np.ndarray,
    rows: np.ndarray,
    mode: str,
    src: str,
    column: str,
    named: bool,
    notes: list[str],
) -> tuple[np.ndarray, tuple[str, ...]]:
    """Find time running backwards or jumping back in file order, before any sorting.

    A trajectory whose time mostly runs backwards is refused; at jumps back (see
    :func:`_jumps_back`) the trajectory is split into parts, each a trajectory of
    its own (``mode="split"``), or refused (``mode="refuse"``).

    Returns
    -------
    codes, names
        Trajectory codes and names with the parts added (unchanged without jumps).
    """
    parts: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    rows_timed = np.flatnonzero(timed)
    by_code = rows_timed[np.argsort(codes[rows_timed], kind="stable")]  # file order kept
    bounds = np.searchsorted(codes[by_code], np.arange(len(names) + 1))
    for k in range(len(names)):
        idx = by_code[bounds[k] : bounds[k + 1]]
        if idx.size < 2:
            continue
        tk = t[idx]
        steps = np.diff(tk)
        n_back = int(np.count_nonzero(steps < 0))
        n_fwd = int(np.count_nonzero(steps > 0))
        where = f" of trajectory '{names[k]}'" if named else ""
        if n_back >= 2 and n_back > n_fwd:
            raise TimeError(
                f"time runs backwards{where} ({n_back} of {steps.size} steps go back, "
                f"from {tk[0]:g} at row {int(rows[idx[0]])} to {tk[-1]:g} at row "
                f"{int(rows[idx[-1]])}); sort the rows by time, or pass "
                "time_jumps='sort' (--time-jumps sort) to let fitdyn sort them",
                source=src,
                column=column,
                row=int(rows[idx[0]]),
            )
        jumps = _jumps_back(tk)
        if jumps.size == 0:
            continue
        j0 = int(jumps[0])
        if mode == "refuse":
            raise TimeError(
                f"time jumps back{where} from {tk[j0 - 1]:g} at row {int(rows[idx[j0 - 1]])} "
                f"to {tk[j0]:g} (a clock hour repeated when daylight saving time ends, a "
                "clock restart, or files joined together?); fix the times, or pass "
                "time_jumps='split' to fit each stretch as a trajectory of its own, or "
                "'sort' to sort the rows by time",
                source=src,
                column=column,
                row=int(rows[idx[j0]]),
            )
        at = ", ".join(f"row {int(rows[idx[j]])}" for j in jumps[:5].tolist())
        more = f" and {jumps.size - 5} more" if jumps.size > 5 else ""
        notes.append(
            f"time jumps back{where} at {at}{more} (first from {tk[j0 - 1]:g} to "
            f"{tk[j0]:g}): a repeated clock hour, a clock restart or joined files?; the "
            f"{jumps.size + 1} stretches are kept apart as trajectories of their own "
            f"('{names[k]} (part 2)'...), not merged by time; time_jumps='sort' sorts "
            "them together instead"
        )
        every = np.flatnonzero(codes == k)
        parts[k] = (every, np.searchsorted(idx[jumps], every, side="right"))
    if not parts:
        return codes, names
    new_codes = codes.copy()
    new_names: list[str] = []
    taken = set(names)
    first_code = {}
    for k, name in enumerate(names):
        first_code[k] = len(new_names)
        new_names.append(name)
        if k in parts:
            every, part = parts[k]
            for p in range(1, int(part.max()) + 1):
                label = f"{name} (part {p + 1})"
                while label in taken:
                    label += "'"
                taken.add(label)
                new_names.append(label)
    shift = np.array([first_code[k] for k in range(len(names))], dtype=np.int64)
    ok = codes >= 0
    new_codes[ok] = shift[codes[ok]]
    for k, (every, part) in parts.items():
        new_codes[every] = first_code[k] + part
    return new_codes, tuple(new_names)


def _note_restart(t: np.ndarray, rows: np.ndarray, notes: list[str]) -> None:
    """Note (without refusing) a single trajectory whose times start over."""
    if t.size < 6:
        return
    drops = np.flatnonzero(np.diff(t) < 0) + 1
    if drops.size == 0 or drops.size > 3:
        return
    bounds = np.r_[0, drops, t.size]
    if np.min(np.diff(bounds)) < 3:
        return
    for a, b in zip(bounds[1:-1], bounds[2:], strict=True):
        if t[a] <= t[0] and b - a >= 3:
            notes.append(
                f"time starts over at row {int(rows[a])}; if the file holds several "
                "recordings, add a trajectory column (e.g. 'run') to keep them apart"
            )
            return


def _hampel(x: np.ndarray, traj: np.ndarray, k: int, threshold: float) -> np.ndarray:
    """Hampel identifier per channel within trajectories.

    For each sample with ``k`` neighbours on both sides inside its trajectory, the
    reference is the median ``m`` of those ``2k`` neighbours (the sample itself left
    out) and the scale is ``1.4826 * MAD`` of the neighbours, floored by the
    trajectory's typical deviation ``1.4826 * median |x - m|``.  The sample is an
    outlier when ``|x - m| > threshold * scale`` in either channel.

    Leaving the sample out and flooring the scale keep the false-alarm rate close to
    the nominal rate of a ``threshold``-sigma rule for Gaussian noise (about 0.3 %
    per channel at 3); the textbook form with a 7-sample local MAD alone flags
    several percent of clean samples.  Samples closer than ``k`` to either end of
    their trajectory are not tested.
    """
    n = x.shape[0]
    flag = np.zeros(n, dtype=bool)
    w = 2 * k + 1
    if n < w:
        return flag
    tw = np.lib.stride_tricks.sliding_window_view(traj, w)  # (n - 2k, w)
    full = np.all(tw == tw[:, :1], axis=1)
    centre = np.flatnonzero(full) + k
    if centre.size == 0:
        return flag
    xw = np.lib.stride_tricks.sliding_window_view(x, w, axis=0)[centre - k]  # (m, 2, w)
    nb = np.concatenate([xw[:, :, :k], xw[:, :, k + 1 :]], axis=2)
    med = np.median(nb, axis=2)
    mad = np.median(np.abs(nb - med[:, :, None]), axis=2)
    dev = np.abs(x[centre] - med)
    typical = pd.DataFrame(dev).groupby(traj[centre]).transform("median").to_numpy()
    scale = 1.4826 * np.maximum(mad, typical)
    tol = 64 * np.finfo(float).eps * np.abs(med)
    out = dev > np.maximum(threshold * scale, tol)
    flag[centre] = out.any(axis=1)
    return flag
