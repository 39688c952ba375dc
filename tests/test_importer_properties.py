"""Property tests of fitdyn.read on messy generated tables (CSV text and DataFrames).

Whatever the table, read() either returns a Recording whose cleaning log accounts for
every input row exactly once (kept + dropped + merged == input rows), with finite
values and strictly increasing times inside each trajectory, or raises a FitdynError.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from fitdyn.errors import FitdynError
from fitdyn.importer import read
from fitdyn.recording import Recording

GARBAGE = ["", "NA", "nan", "abc", "inf", "-inf", "1e999", "?", "#N/A", " ", "--", "x1", "1 2"]
RUNS = ["A", "A", "A", "B", "B", "C", "", "NA"]

SETTINGS = settings(
    max_examples=500,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)

numbers = st.one_of(
    st.integers(-3, 3).map(float),
    st.floats(-100, 100, allow_nan=False, allow_infinity=False, width=32),
)
# numbers three times as often as garbage
cells = st.one_of(numbers, numbers, numbers, st.sampled_from(GARBAGE))
time_cells = st.one_of(
    st.integers(0, 12).map(float),
    st.integers(0, 12).map(float),
    st.integers(0, 12).map(float),
    st.floats(0, 12, allow_nan=False, width=16),
    st.sampled_from(GARBAGE),
)


@st.composite
def tables(draw):
    """A messy table: list of column names and rows of cells (floats or strings)."""
    n = draw(st.integers(0, 24))
    names = ["time", "x", "y"]
    has_run = draw(st.booleans())
    extra = draw(st.sampled_from(["none", "empty", "text", "numeric"]))
    if has_run:
        names.insert(0, "run")
    if extra != "none":
        names.append({"empty": "spare", "text": "comment", "numeric": "z"}[extra])
    rows = []
    sorted_times = draw(st.booleans())
    for _ in range(n):
        row = {"time": draw(time_cells), "x": draw(cells), "y": draw(cells)}
        if has_run:
            row["run"] = draw(st.sampled_from(RUNS))
        if extra == "empty":
            row["spare"] = ""
        elif extra == "text":
            row["comment"] = draw(st.sampled_from(["ok", "check", "", "bad sensor"]))
        elif extra == "numeric":
            row["z"] = draw(numbers)
        rows.append(row)
    if rows and draw(st.booleans()):
        # exact duplicates and repeated timestamps
        for _ in range(draw(st.integers(1, 4))):
            src = draw(st.sampled_from(rows))
            dup = dict(src)
            if draw(st.booleans()):
                dup["x"] = draw(numbers)
            rows.insert(draw(st.integers(0, len(rows))), dup)
    if sorted_times:
        rows.sort(key=lambda r: r["time"] if isinstance(r["time"], float) else -1.0)
    else:
        rows = draw(st.permutations(rows))
    # with a third numeric column the channels must be named
    channels = ("x", "y") if extra == "numeric" and draw(st.booleans()) else None
    return names, rows, channels


options = st.fixed_dictionaries(
    {
        "repeated_times": st.sampled_from(["average", "average", "refuse"]),
        "outliers": st.sampled_from(["flag", "drop", "ignore"]),
        "outlier_window": st.integers(3, 7),
        "gap_factor": st.sampled_from([3.0, 1.5, None]),
        "min_samples": st.sampled_from([1, 1, 2, 3]),
    }
)


def fmt(cell, decimal: str) -> str:
    if isinstance(cell, float):
        text = repr(cell)
        return text.replace(".", ",") if decimal == "," else text
    return cell


def check_recording(rec: Recording, expected_rows: list[int]) -> None:
    log = rec.log
    seen = [f.row for f in log.fates]
    assert sorted(seen) == sorted(expected_rows)
    assert len(set(seen)) == len(seen)
    assert log.balanced()
    assert log.kept_rows + log.dropped_rows + log.merged_rows == log.input_rows
    assert sum(log.dropped().values()) == log.dropped_rows
    assert log.kept_rows == rec.n_samples
    assert sorted(rec.source_rows.tolist()) == sorted(log.rows_with("kept"))
    assert not np.isnan(rec.values).any() and np.isfinite(rec.values).all()
    assert np.isfinite(rec.times).all()
    assert rec.values.shape == (rec.n_samples, 2)
    for k in range(rec.n_trajectories):
        tk = rec.times[rec.trajectory == k]
        assert tk.size >= 1
        assert np.all(np.diff(tk) > 0)
    assert np.all(np.diff(rec.trajectory) >= 0)
    assert np.all(np.diff(rec.segment) >= 0)
    change = np.flatnonzero(np.diff(rec.trajectory) != 0) + 1
    assert np.all(rec.segment[change] > rec.segment[change - 1])
    assert int(rec.outlier.sum()) == log.flagged().get("outlier", 0)
    for f in log.fates:
        if f.status == "kept":
            assert f.reason is None
        else:
            assert f.reason is not None and not f.flags
    rec.describe()
    rec.summary()


@SETTINGS
@given(
    table=tables(),
    sep=st.sampled_from([",", ";", "\t"]),
    comma=st.booleans(),
    comments=st.integers(0, 2),
    opts=options,
)
def test_messy_csv(tmp_path_factory, table, sep, comma, comments, opts):
    names, rows, channels = table
    decimal = "," if (comma and sep != ",") else "."
    lines = [f"# comment {k}" for k in range(comments)]
    lines.append(sep.join(names))
    header_line = len(lines)
    expected = []
    times = {}
    for k, row in enumerate(rows):
        text = sep.join(fmt(row[c], decimal) for c in names)
        lineno = header_line + k + 1
        lines.append(text)
        if text.strip():
            expected.append(lineno)
            times[lineno] = fmt(row["time"], decimal)
    path = tmp_path_factory.mktemp("messy") / "table.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    before = path.read_bytes()
    try:
        rec = read(path, channels=channels, **opts)
    except FitdynError as exc:
        event(f"error {type(exc).__name__}")
        assert path.read_bytes() == before
        return
    event("recording")
    assert path.read_bytes() == before
    check_recording(rec, expected)
    # each sample's time is the time cell of its source row
    for t, r in zip(rec.times, rec.source_rows, strict=True):
        assert t == float(times[int(r)].replace(",", "."))


def frame_cell(cell):
    """Cells as a user's DataFrame may hold them: floats, NaN, None, inf, strings."""
    if isinstance(cell, float):
        return cell
    return {"": None, "NA": np.nan, "inf": np.inf, "-inf": -np.inf}.get(cell, cell)


@SETTINGS
@given(
    table=tables(),
    index=st.sampled_from(["range", "shuffled", "strings", "duplicated"]),
    numeric=st.booleans(),
    opts=options,
)
def test_messy_dataframe(table, index, numeric, opts):
    names, rows, channels = table
    data = {c: [frame_cell(r[c]) for r in rows] for c in names}
    if numeric:
        # numeric dtype where possible, as pandas would hold a clean column
        for c in names:
            try:
                data[c] = np.asarray(data[c], dtype=float)
            except (TypeError, ValueError):
                pass
    frame = pd.DataFrame(data, columns=names)
    n = len(rows)
    if index == "shuffled":
        frame.index = np.random.default_rng(n).permutation(n) + 10
    elif index == "strings":
        frame.index = [f"r{k}" for k in range(n)]
    elif index == "duplicated":
        frame.index = [k // 2 for k in range(n)]
    labels = frame.index
    if pd.api.types.is_integer_dtype(labels.dtype) and labels.is_unique:
        expected = [int(i) for i in labels]  # documented: index labels when unique integers
    else:
        expected = list(range(n))  # otherwise 0-based positions
    copy = frame.copy(deep=True)
    try:
        rec = read(frame, channels=channels, **opts)
    except FitdynError as exc:
        event(f"error {type(exc).__name__}")
        pd.testing.assert_frame_equal(frame, copy)
        return
    event("recording")
    pd.testing.assert_frame_equal(frame, copy)
    check_recording(rec, expected)


@settings(max_examples=200, deadline=None)
@given(
    n=st.integers(0, 30),
    data=st.data(),
)
def test_arrays_accounting(n, data):
    times = st.one_of(st.integers(0, 12).map(float), st.sampled_from([np.nan, np.inf]))
    t = np.asarray(data.draw(st.lists(times, min_size=n, max_size=n)), dtype=float)
    X = np.asarray(
        data.draw(
            st.lists(
                st.tuples(
                    st.one_of(numbers, st.sampled_from([np.nan, np.inf])),
                    st.one_of(numbers, st.sampled_from([np.nan, -np.inf])),
                ),
                min_size=n,
                max_size=n,
            )
        ),
        dtype=float,
    ).reshape(n, 2)
    try:
        rec = read((t, X))
    except FitdynError as exc:
        event(f"error {type(exc).__name__}")
        return
    event("recording")
    check_recording(rec, list(range(n)))
