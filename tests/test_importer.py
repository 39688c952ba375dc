"""Tests of fitdyn.importer.read: every source kind, every defect, every error."""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import fitdyn
from fitdyn.errors import ColumnError, FitdynError, InputError, TimeError, TooFewSamplesError
from fitdyn.importer import REASONS, read, split_unit
from fitdyn.recording import Recording

DEMO = Path(__file__).resolve().parent.parent / "data_demo"


# -- helpers ---------------------------------------------------------------------------
def curves(n: int = 20, step: float = 1.0, t0: float = 0.0):
    """Smooth monotone test curves (never outliers): times and two channels."""
    t = t0 + step * np.arange(n)
    x = 5.0 * np.exp(-0.2 * t) + 1.0
    y = 2.0 * np.exp(-0.05 * t) - 3.0
    return t, x, y


def csv_text(t, x, y, sep=",", header=("time", "x", "y"), decimal=".") -> str:
    def f(v: float) -> str:
        s = repr(float(v))
        return s.replace(".", ",") if decimal == "," else s

    lines = [sep.join(header)]
    lines += [sep.join((f(a), f(b), f(c))) for a, b, c in zip(t, x, y, strict=True)]
    return "\n".join(lines) + "\n"


def write(tmp_path: Path, name: str, text: str, encoding: str = "utf-8") -> Path:
    p = tmp_path / name
    p.write_bytes(text.encode(encoding))
    return p


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def fates(rec: Recording) -> dict[int, tuple]:
    return {f.row: (f.status, f.reason, f.flags) for f in rec.log.fates}


def assert_consistent(rec: Recording) -> None:
    """Invariants every recording must satisfy."""
    log = rec.log
    assert log.balanced()
    assert log.kept_rows == rec.n_samples
    assert sorted(rec.source_rows.tolist()) == sorted(log.rows_with("kept"))
    assert np.all(np.isfinite(rec.values)) and np.all(np.isfinite(rec.times))
    for k in range(rec.n_trajectories):
        tk = rec.times[rec.trajectory == k]
        assert tk.size > 0 and np.all(np.diff(tk) > 0)
    assert np.all(np.diff(rec.trajectory) >= 0)
    assert np.all(np.diff(rec.segment) >= 0)
    new_traj = np.flatnonzero(np.diff(rec.trajectory) != 0) + 1
    assert np.all(rec.segment[new_traj] != rec.segment[new_traj - 1])


# -- text sources ------------------------------------------------------------------------
def test_csv_basic_line_numbers_units_and_log(tmp_path):
    t, x, y = curves(12)
    p = write(tmp_path, "a.csv", csv_text(t, x, y, header=("time [s]", "temp [K]", "flow (L/min)")))
    rec = read(p)
    assert rec.channels == ("temp", "flow")
    assert rec.units == ("K", "L/min")
    assert rec.time_unit == "s"
    np.testing.assert_allclose(rec.times, t)
    np.testing.assert_allclose(rec.values, np.column_stack([x, y]))
    # header is line 1, so the data rows are lines 2..13
    assert rec.source_rows.tolist() == list(range(2, 14))
    assert rec.log.input_rows == 12 and rec.log.kept_rows == 12
    assert rec.source == str(p)
    assert rec.source_columns == {
        "time": "time [s]",
        "channels": ["temp [K]", "flow (L/min)"],
        "trajectory": None,
    }
    assert_consistent(rec)


@pytest.mark.parametrize(
    ("sep", "name"), [("\t", "a.tsv"), (";", "a.csv"), ("|", "a.txt"), (", ", "b.csv")]
)
def test_delimiters_are_sniffed(tmp_path, sep, name):
    t, x, y = curves(10)
    rec = read(write(tmp_path, name, csv_text(t, x, y, sep=sep)))
    np.testing.assert_allclose(rec.values[:, 1], y)
    assert rec.n_samples == 10


def test_whitespace_separated_with_spaces_inside_unit_headers(tmp_path):
    t, x, y = curves(10)
    lines = ["time [s]    temp [K]   p / bar"]
    lines += [f"{a:8.3f}  {b:10.6f}   {c:10.6f}" for a, b, c in zip(t, x, y, strict=True)]
    rec = read(write(tmp_path, "w.dat", "\n".join(lines) + "\n"))
    assert rec.channels == ("temp", "p") and rec.units == ("K", "bar")
    assert rec.time_unit == "s"
    np.testing.assert_allclose(rec.values[:, 0], x, atol=1e-6)


def test_semicolon_decimal_comma_and_comment_lines(tmp_path):
    t, x, y = curves(8, step=0.5)
    body = csv_text(t, x, y, sep=";", header=("t (min)", "level [m]", "rate [m/min]"), decimal=",")
    text = "# logger export\n# site 4\n\n" + body
    rec = read(write(tmp_path, "c.csv", text))
    assert rec.time_unit == "min"
    np.testing.assert_allclose(rec.times, t)
    np.testing.assert_allclose(rec.values, np.column_stack([x, y]))
    # 2 comment lines, 1 blank line, header on line 4: data on lines 5..12
    assert rec.source_rows.tolist() == list(range(5, 13))
    assert any("decimal comma" in n for n in rec.log.notes)


def test_decimal_option_overrides_detection(tmp_path):
    text = "time;x;y\n1;2;3\n2;4;5\n3;6;8\n"
    rec = read(write(tmp_path, "d.csv", text), decimal=",")
    np.testing.assert_allclose(rec.values[:, 0], [2, 4, 6])


def test_utf8_bom_is_ignored(tmp_path):
    t, x, y = curves(6)
    p = tmp_path / "bom.csv"
    p.write_bytes(b"\xef\xbb\xbf" + csv_text(t, x, y).encode())
    rec = read(p)
    assert rec.source_columns["time"] == "time"
    assert rec.source_rows[0] == 2


def test_latin1_fallback(tmp_path):
    t, x, y = curves(6)
    text = csv_text(t, x, y, header=("time [s]", "temp [°C]", "cond [µS/cm]"))
    rec = read(write(tmp_path, "l.csv", text, encoding="latin-1"))
    assert rec.units == ("°C", "µS/cm")
    assert any("latin-1" in n for n in rec.log.notes)


def test_utf16_with_bom(tmp_path):
    t, x, y = curves(6)
    rec = read(write(tmp_path, "u16.txt", csv_text(t, x, y, sep="\t"), encoding="utf-16"))
    np.testing.assert_allclose(rec.values[:, 0], x)


def test_comment_and_blank_lines_inside_data_are_not_rows(tmp_path):
    text = "time,x,y\n0,1,2\n# pause\n\n1,2,3\n2,3,4\n  # indented comment\n3,4,5\n"
    rec = read(write(tmp_path, "m.csv", text))
    assert rec.log.input_rows == 4
    assert rec.source_rows.tolist() == [2, 5, 6, 8]


def test_headerless_file_and_header_in_comment(tmp_path):
    rec = read(write(tmp_path, "h.csv", "0,1,2\n1,2,3\n2,3,5\n"))
    assert rec.source_columns["time"] == "column 1"
    assert rec.source_rows.tolist() == [1, 2, 3]
    rec = read(write(tmp_path, "h2.csv", "# time, a [V], b [V]\n0,1,2\n1,2,3\n2,3,5\n"))
    assert rec.channels == ("a", "b") and rec.units == ("V", "V")
    assert rec.source_rows.tolist() == [2, 3, 4]


def test_trailing_separators_and_short_rows(tmp_path):
    text = "time,x,y,\n0,1,2,\n1,2,3,\n2,3\n3,4,5,\n"
    rec = read(write(tmp_path, "t.csv", text))
    assert fates(rec)[4] == ("dropped", "missing value", ())
    assert rec.n_samples == 3


def test_quoted_fields(tmp_path):
    text = 'time,"p, abs [bar]",q\n0,"1.5",2\n1,"2.5",3\n2,"3.5",4\n'
    rec = read(write(tmp_path, "q.csv", text))
    assert rec.channels == ("p, abs", "q")
    np.testing.assert_allclose(rec.values[:, 0], [1.5, 2.5, 3.5])


# -- other sources -----------------------------------------------------------------------
def test_xlsx_rows_are_sheet_rows(tmp_path):
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "log"
    ws.append(["# exported"])
    ws.append(["time [s]", "a [V]", "b [V]"])
    t, x, y = curves(6)
    for a, b, c in zip(t, x, y, strict=True):
        ws.append([float(a), float(b), float(c)])
    ws.append([6.0, "n/a", 1.0])
    other = wb.create_sheet("second")
    other.append(["time", "u", "v"])
    for k in range(5):
        other.append([k, k * 2.0, "3,5"])
    p = tmp_path / "w.xlsx"
    wb.save(p)
    before = digest(p)
    rec = read(p)
    assert rec.channels == ("a", "b") and rec.units == ("V", "V")
    assert rec.source_rows.tolist() == list(range(3, 9))
    assert fates(rec)[9] == ("dropped", "missing value", ())
    assert "log" in rec.source
    rec2 = read(p, sheet="second")
    np.testing.assert_allclose(rec2.values[:, 1], 3.5)  # decimal comma in text cells
    assert read(p, sheet=1).n_samples == 5
    with pytest.raises(InputError, match="no sheet 'third'.*'log', 'second'"):
        read(p, sheet="third")
    assert digest(p) == before


def test_xlsx_without_openpyxl_says_what_to_install(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "openpyxl", None)
    p = tmp_path / "x.xlsx"
    p.write_bytes(b"not really")
    with pytest.raises(InputError, match=r'pip install "fitdyn\[excel\]"') as err:
        read(p)
    assert str(p) in str(err.value)


def test_parquet(tmp_path):
    pytest.importorskip("pyarrow")
    t, x, y = curves(9)
    df = pd.DataFrame({"time [s]": t, "a": x, "b": y})
    df.loc[3, "a"] = np.nan
    p = tmp_path / "r.parquet"
    df.to_parquet(p)
    before = digest(p)
    rec = read(p)
    assert rec.n_samples == 8
    assert fates(rec)[3] == ("dropped", "missing value", ())
    assert digest(p) == before


def test_parquet_without_pyarrow_says_what_to_install(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "pyarrow", None)
    monkeypatch.setitem(sys.modules, "pyarrow.parquet", None)
    p = tmp_path / "r.parquet"
    p.write_bytes(b"PAR1")
    with pytest.raises(InputError, match=r'pip install "fitdyn\[parquet\]"'):
        read(p)


def test_dataframe_index_labels_are_rows():
    t, x, y = curves(8)
    df = pd.DataFrame({"time": t, "x": x, "y": y}, index=np.arange(100, 108))
    df.loc[104, "y"] = np.inf
    rec = read(df)
    assert fates(rec)[104] == ("dropped", "non-finite value", ())
    assert rec.source_rows[0] == 100 and rec.source == "DataFrame"
    df.index = [f"r{k}" for k in range(8)]
    rec = read(df)
    assert sorted(fates(rec)) == list(range(8))


def test_dataframe_with_string_columns():
    df = pd.DataFrame(
        {"time": ["0", "1", "2", "3"], "x": ["1.0", "x", "3.0", "4.0"], "y": [1.0, 2, 3, 4]},
        dtype=object,
    ).astype({"time": "string", "x": "string"})
    rec = read(df)
    assert fates(rec)[1] == ("dropped", "non-numeric value", ())
    assert rec.n_samples == 3


def test_mapping_source():
    t, x, y = curves(5)
    rec = read({"time": t, "u": x, "v": y})
    assert rec.channels == ("u", "v") and rec.source == "mapping"


def test_arrays_source():
    t, x, y = curves(7)
    X = np.column_stack([x, y])
    rec = read((t, X))
    assert rec.channels == ("x1", "x2") and rec.source == "arrays"
    assert rec.source_rows.tolist() == list(range(7))
    rec = read((t, X), channels=("heat [W]", "temp [K]"), time_unit="h")
    assert rec.channels == ("heat", "temp") and rec.units == ("W", "K")
    assert rec.time_unit == "h"
    rec = read((t, x, y))
    np.testing.assert_allclose(rec.values, X)
    with pytest.raises(InputError, match=r"shape \(n, 2\).*X\.T"):
        read((t, X.T))
    with pytest.raises(InputError, match="equal lengths"):
        read((t[:-1], X))


def test_arrays_with_trajectory_ids_and_unsorted_times():
    t = np.array([2.0, 0.0, 1.0, 0.0, 1.0, 2.0])
    X = np.arange(12.0).reshape(6, 2)
    rec = read((t, X), trajectory=["a", "a", "a", "b", "b", "b"])
    assert rec.trajectory_names == ("a", "b")
    np.testing.assert_allclose(rec.times, [0, 1, 2, 0, 1, 2])
    assert rec.source_rows.tolist() == [1, 2, 0, 3, 4, 5]


def test_recording_passes_through(tmp_path):
    t, x, y = curves(5)
    rec = read((t, np.column_stack([x, y])))
    assert read(rec) is rec
    assert fitdyn.read is read


def test_to_frame_reads_back():
    t, x, y = curves(10)
    rec = read(pd.DataFrame({"run": ["p"] * 5 + ["q"] * 5, "time [s]": t, "a [V]": x, "b": y}))
    again = read(rec.to_frame())
    np.testing.assert_allclose(again.values, rec.values)
    assert again.units == rec.units and again.trajectory_names == ("p", "q")


# -- time columns ----------------------------------------------------------------------
def test_iso_timestamps_become_seconds(tmp_path):
    stamps = pd.date_range("2024-03-01T12:00:00", periods=6, freq="30s")
    lines = ["timestamp,a,b"] + [
        f"{s.isoformat()},{k},{k * k}" for k, s in zip(range(6), stamps, strict=True)
    ]
    lines[3], lines[4] = lines[4], lines[3]  # unsorted
    rec = read(write(tmp_path, "ts.csv", "\n".join(lines)))
    np.testing.assert_allclose(rec.times, np.arange(6) * 30.0)
    assert rec.time_unit == "s"
    assert rec.time_origin == "2024-03-01T12:00:00"
    rec = read(write(tmp_path, "ts.csv", "\n".join(lines)), time_unit="min")
    np.testing.assert_allclose(rec.times, np.arange(6) * 0.5)
    assert rec.time_unit == "min"


def test_timestamps_with_offsets_and_datetime_dtype():
    txt = ["2024-01-01T00:00:00+01:00", "2024-01-01T00:00:10+01:00", "2023-12-31T23:00:20Z"]
    rec = read(pd.DataFrame({"date": txt, "u": [1.0, 2, 3], "v": [3.0, 2, 1]}))
    np.testing.assert_allclose(rec.times, [0, 10, 20])
    stamps = pd.date_range("2024-05-01", periods=4, freq="h")
    rec = read(pd.DataFrame({"when": stamps, "u": [1.0, 2, 3, 4], "v": [4.0, 3, 2, 1]}))
    np.testing.assert_allclose(rec.times, [0, 3600, 7200, 10800])
    assert rec.time_origin.startswith("2024-05-01")


def test_durations_are_seconds(tmp_path):
    text = "elapsed,a,b\n00:00:00,1,2\n00:01:30,2,3\n00:03:00,3,5\n"
    rec = read(write(tmp_path, "d.csv", text))
    np.testing.assert_allclose(rec.times, [0, 90, 180])
    assert rec.time_unit == "s" and rec.time_origin is None


def test_digit_groups_are_not_durations(tmp_path):
    # pandas.to_timedelta reads '1 2' as nanoseconds; a time cell like that is a
    # typo, not a duration (found by the property test)
    text = "time,a,b\n1 2,1,2\n3 4,2,3\n"
    with pytest.raises(FitdynError, match=r"column 'time', row 2: cannot be read as times"):
        read(write(tmp_path, "g.csv", text))
    rec = read(write(tmp_path, "u.csv", "time,a,b\n0 s,1,2\n90 s,2,3\n3 min,3,5\n"))
    np.testing.assert_allclose(rec.times, [0, 90, 180])


@pytest.mark.parametrize(
    ("header", "unit"),
    [("t (min)", "min"), ("seconds", "s"), ("Time_h", "h"), ("TIME [ms]", "ms"), ("t", None)],
)
def test_time_column_found_by_name_with_unit(tmp_path, header, unit):
    text = f"a,{header},b\n1,0,2\n2,1,3\n3,2,5\n"
    rec = read(write(tmp_path, "n.csv", text))
    assert rec.source_columns["time"] == header
    assert rec.time_unit == unit
    assert rec.channels == ("a", "b")


def test_time_unit_option_overrides_header(tmp_path):
    text = "time [s],a,b\n0,1,2\n1,2,3\n2,3,5\n"
    rec = read(write(tmp_path, "o.csv", text), time_unit="min")
    assert rec.time_unit == "min"
    assert any("instead of 's'" in n for n in rec.log.notes)


def test_time_found_as_first_strictly_increasing_column(tmp_path):
    text = "u,clock,v\n5,10,2\n4,11,3\n7,12,5\n6,13,1\n"
    rec = read(write(tmp_path, "inc.csv", text))
    assert rec.source_columns["time"] == "clock"
    assert rec.channels == ("u", "v")


def test_columns_by_full_header_bare_name_or_position(tmp_path):
    text = "time [s],temp [K],p/bar,q (Pa)\n0,1,2,3\n1,2,3,4\n2,3,5,6\n"
    p = write(tmp_path, "c.csv", text)
    assert read(p, channels=("temp [K]", "p/bar")).channels == ("temp", "p")
    assert read(p, channels=("TEMP", "q")).units == ("K", "Pa")
    assert read(p, channels=("temp (K)", 3)).channels == ("temp", "q")
    assert read(p, time="time", channels=["p", "q"]).units == ("bar", "Pa")


@pytest.mark.parametrize(
    ("header", "name", "unit"),
    [
        ("temp [K]", "temp", "K"),
        ("temp (K)", "temp", "K"),
        ("temp/K", "temp", "K"),
        ("temp / K", "temp", "K"),
        ("conc [mol/L]", "conc", "mol/L"),
        ("plain", "plain", None),
        ("x []", "x", None),
    ],
)
def test_split_unit(header, name, unit):
    assert split_unit(header) == (name, unit)


# -- defects ---------------------------------------------------------------------------
def test_missing_nonnumeric_nonfinite_have_distinct_reasons(tmp_path):
    text = (
        "time,x,y\n"
        "0,1,2\n"  # 2
        "1,,3\n"  # 3 missing
        "2,abc,4\n"  # 4 non-numeric
        "3,inf,5\n"  # 5 non-finite
        "4,NA,6\n"  # 6 missing
        "5,1e999,7\n"  # 7 non-finite (overflow)
        ",1,2\n"  # 8 missing time
        "soon,1,2\n"  # 9 unparseable time
        "6,2,3\n"  # 10
        "7,3,-Infinity\n"  # 11 non-finite
        "8,4,5\n"  # 12
    )
    rec = read(write(tmp_path, "bad.csv", text))
    f = fates(rec)
    assert f[3][1] == f[6][1] == "missing value"
    assert f[4][1] == "non-numeric value"
    assert f[5][1] == f[7][1] == f[11][1] == "non-finite value"
    assert f[8][1] == "missing time"
    assert f[9][1] == "unparseable time"
    assert rec.log.dropped() == {
        "missing value": 2,
        "non-numeric value": 1,
        "non-finite value": 3,
        "missing time": 1,
        "unparseable time": 1,
    }
    assert rec.source_rows.tolist() == [2, 10, 12]
    assert any("column 'x' first at row 3" in n for n in rec.log.notes)
    assert_consistent(rec)


def test_missing_trajectory_id_is_a_drop(tmp_path):
    text = "run,time,x,y\na,0,1,2\na,1,2,3\n,2,3,4\na,2,3,5\n"
    rec = read(write(tmp_path, "id.csv", text))
    assert fates(rec)[4] == ("dropped", "missing trajectory id", ())


def test_duplicate_rows_are_dropped(tmp_path):
    text = "time,x,y\n0,1,2\n1,2,3\n1,2,3\n2,3,4\n1.0,2.0,3.0\n3,4,5\n"
    rec = read(write(tmp_path, "dup.csv", text))
    f = fates(rec)
    assert f[3][0] == "kept"
    assert f[4] == f[6] == ("dropped", "duplicate row", ())
    assert rec.n_samples == 4


def test_repeated_timestamps_average_or_refuse(tmp_path):
    text = "time,x,y\n0,1,2\n1,2,3\n2,3,4\n1,4,7\n1,6,8\n3,4,5\n"
    p = write(tmp_path, "rep.csv", text)
    rec = read(p)
    f = fates(rec)
    assert f[3] == ("kept", None, ())
    assert f[5] == f[6] == ("merged", "repeated timestamp", ())
    k = int(np.flatnonzero(rec.times == 1.0)[0])
    np.testing.assert_allclose(rec.values[k], [4.0, 6.0])  # mean of (2,3), (4,7), (6,8)
    assert rec.source_rows[k] == 3
    assert rec.log.merged_rows == 2 and rec.log.input_rows == 6
    with pytest.raises(TimeError) as err:
        read(p, repeated_times="refuse")
    msg = str(err.value)
    assert str(p) in msg and "column 'time'" in msg and "rows 3 and 5" in msg
    assert "repeated_times='average'" in msg


def test_duplicates_then_repeats_in_one_trajectory_only(tmp_path):
    # the same time in two trajectories is not a repeat
    text = "run,time,x,y\na,0,1,1\nb,0,5,5\na,1,2,2\nb,1,6,6\na,2,3,3\nb,2,7,7\n"
    rec = read(write(tmp_path, "two.csv", text))
    assert rec.log.merged_rows == 0 and rec.n_samples == 6


def spiky(n: int = 40, spike_at: int = 20, size: float = 4.0):
    t, x, y = curves(n)
    x = x.copy()
    x[spike_at] += size
    return t, x, y


def test_outlier_flag_drop_ignore(tmp_path):
    t, x, y = spiky()
    p = write(tmp_path, "sp.csv", csv_text(t, x, y))
    line = 20 + 2
    rec = read(p)
    assert rec.outlier.sum() == 1 and rec.source_rows[rec.outlier][0] == line
    assert fates(rec)[line] == ("kept", None, ("outlier",))
    assert rec.describe()["outliers"] == 1 and rec.n_samples == 40
    rec = read(p, outliers="drop")
    assert fates(rec)[line] == ("dropped", "outlier", ())
    assert rec.n_samples == 39 and not rec.outlier.any()
    assert rec.describe()["outliers"] == 1
    rec = read(p, outliers="ignore")
    assert not rec.outlier.any() and rec.n_samples == 40
    rec = read(p, outlier_threshold=1e6)
    assert not rec.outlier.any()


def test_outliers_detected_per_channel_and_per_trajectory():
    t, x, y = curves(30)
    y2 = y.copy()
    y2[12] -= 3.0
    df = pd.DataFrame(
        {"run": ["a"] * 30 + ["b"] * 30, "time": np.r_[t, t], "x": np.r_[x, x], "y": np.r_[y, y2]}
    )
    rec = read(df)
    assert rec.source_rows[rec.outlier].tolist() == [42]


def test_outlier_false_alarm_rate_on_gaussian_noise():
    # A 3-sigma rule on Gaussian noise flags about 0.27 % per channel (two-sided
    # normal tail, common practice, no source); allow a generous margin.
    rng = np.random.default_rng(7)
    n = 4000
    rec = read((np.arange(n, dtype=float), rng.normal(size=(n, 2))))
    assert rec.outlier.mean() < 0.012


def test_merged_outlier_drop_accounts_for_all_rows(tmp_path):
    t, x, y = spiky()
    text = csv_text(t, x, y) + f"{t[20]},{x[20] + 0.1},{y[20]}\n"
    rec = read(write(tmp_path, "mo.csv", text), outliers="drop")
    assert rec.log.dropped()["outlier"] == 2
    assert_consistent(rec)


def test_gaps_make_segments(tmp_path):
    t = np.r_[np.arange(10.0), np.arange(20.0, 30.0)]
    _, x, y = curves(20)
    rec = read(write(tmp_path, "gap.csv", csv_text(t, x, y)))
    assert rec.n_gaps == 1
    assert rec.segment_bounds() == [(0, 10), (10, 20)]
    assert read(write(tmp_path, "gap.csv", csv_text(t, x, y)), gap_factor=None).n_gaps == 0
    assert read(write(tmp_path, "gap.csv", csv_text(t, x, y)), gap_factor=20).n_gaps == 0
    d = rec.describe()
    assert d["gaps"] == 1 and d["segments"] == 2
    assert d["sampling"]["uniform"] is True and d["sampling"]["median_step"] == 1.0


def test_unsorted_rows_are_sorted_within_trajectories(tmp_path):
    t, x, y = curves(10)
    order = [3, 0, 1, 2, 9, 4, 5, 7, 6, 8]
    text = csv_text(t[order], x[order], y[order])
    rec = read(write(tmp_path, "u.csv", text))
    np.testing.assert_allclose(rec.times, t)
    np.testing.assert_allclose(rec.values[:, 0], x)
    assert rec.source_rows.tolist() == [order.index(k) + 2 for k in range(10)]


def test_replicates_keep_first_appearance_order_and_never_join(tmp_path):
    t, x, y = curves(6)
    rows = ["replicate,time [h],a,b"]
    for name in ("B", "A", "C"):
        rows += [f"{name},{a},{b},{c}" for a, b, c in zip(t, x, y, strict=True)]
    rec = read(write(tmp_path, "r.csv", "\n".join(rows)))
    assert rec.trajectory_names == ("B", "A", "C")
    assert rec.n_trajectories == 3 and rec.n_gaps == 0
    assert rec.segment_bounds() == [(0, 6), (6, 12), (12, 18)]
    np.testing.assert_allclose(rec.times, np.r_[t, t, t])
    names = [n for n, _, _ in rec.trajectories()]
    assert names == ["B", "A", "C"]
    assert rec.describe()["samples_per_trajectory"] == {"B": 6, "A": 6, "C": 6}
    assert_consistent(rec)


def test_interleaved_replicates_in_time_order_are_fine(tmp_path):
    rows = ["run,time,a,b"] + [
        f"{r},{k},{k + 1},{2 * k + (r == 'q')}" for k in range(5) for r in "pq"
    ]
    rec = read(write(tmp_path, "il.csv", "\n".join(rows)))
    assert rec.trajectory_names == ("p", "q") and rec.n_samples == 10


def test_unique_id_column_is_not_a_trajectory(tmp_path):
    text = "id,time,a,b\n1,0,1,2\n2,1,2,3\n3,2,3,5\n4,3,4,4\n"
    rec = read(write(tmp_path, "uid.csv", text))
    assert rec.n_trajectories == 1 and rec.channels == ("a", "b")
    rec = read(write(tmp_path, "uid.csv", text), trajectory=False, channels=("a", "b"))
    assert rec.n_trajectories == 1


def test_time_restart_without_trajectory_column_is_noted(tmp_path):
    t, x, y = curves(5)
    text = csv_text(np.r_[t, t], np.r_[x, x + 1], np.r_[y, y])
    # default: the restart splits the file into two trajectories, nothing merged
    rec = read(write(tmp_path, "rs.csv", text), outliers="ignore")
    assert rec.trajectory_names == ("1", "1 (part 2)")
    assert rec.n_samples == 10 and rec.log.merged_rows == 0
    assert any("time jumps back at row 7" in n for n in rec.log.notes)
    # asked to sort: the old behaviour, with the note
    rec = read(write(tmp_path, "rs.csv", text), outliers="ignore", time_jumps="sort")
    assert any("time starts over at row 7" in n for n in rec.log.notes)


# -- errors ----------------------------------------------------------------------------
def one_line(err: pytest.ExceptionInfo) -> str:
    msg = str(err.value)
    assert "\n" not in msg
    assert isinstance(err.value, FitdynError)
    return msg


def test_missing_file(tmp_path):
    p = tmp_path / "nope.csv"
    with pytest.raises(InputError) as err:
        read(p)
    assert str(p) in one_line(err) and "not found" in str(err.value)


def test_empty_and_header_only_files(tmp_path):
    for text in ("", "\n\n", "# only a comment\n"):
        p = write(tmp_path, "e.csv", text)
        with pytest.raises(InputError) as err:
            read(p)
        assert str(p) in one_line(err) and "empty" in str(err.value)
    p = write(tmp_path, "h.csv", "# c\ntime,x,y\n")
    with pytest.raises(InputError) as err:
        read(p)
    assert "row 2" in one_line(err) and "no data rows" in str(err.value)


def test_no_numeric_columns(tmp_path):
    p = write(tmp_path, "nn.csv", "name,colour\nann,red\nbob,blue\ncy,green\n")
    with pytest.raises(ColumnError) as err:
        read(p)
    msg = one_line(err)
    assert str(p) in msg and "no numeric columns" in msg and "'name', 'colour'" in msg


def test_fewer_than_two_channels(tmp_path):
    p = write(tmp_path, "one.csv", "time,x,note\n0,1,a\n1,2,b\n2,3,c\n")
    with pytest.raises(ColumnError) as err:
        read(p)
    msg = one_line(err)
    assert str(p) in msg and "fewer than two" in msg and "'x'" in msg


def test_ambiguous_channels_list_the_candidates(tmp_path):
    p = write(tmp_path, "amb.csv", "time,a,b,c [K]\n0,1,2,3\n1,2,3,4\n2,3,4,5\n")
    with pytest.raises(ColumnError) as err:
        read(p)
    msg = one_line(err)
    assert "'a', 'b', 'c [K]'" in msg and "channels=" in msg and str(p) in msg
    assert read(p, channels=("a", "c")).units == (None, "K")


def test_unknown_column_lists_the_columns(tmp_path):
    p = write(tmp_path, "u.csv", "time,a,b\n0,1,2\n1,2,3\n2,3,4\n")
    with pytest.raises(ColumnError) as err:
        read(p, channels=("a", "z"))
    msg = one_line(err)
    assert "column 'z'" in msg and "'time', 'a', 'b'" in msg and str(p) in msg
    with pytest.raises(ColumnError, match="column 'clock'"):
        read(p, time="clock")
    with pytest.raises(ColumnError, match="column 'batch'"):
        read(p, trajectory="batch")


def test_column_roles_must_differ(tmp_path):
    p = write(tmp_path, "r.csv", "time,a,b\n0,1,2\n1,2,3\n2,3,4\n")
    with pytest.raises(ColumnError, match="both a channel and the time"):
        read(p, channels=("time", "a"))
    with pytest.raises(ColumnError, match="same column"):
        read(p, channels=("a", "a"))


def test_no_time_column(tmp_path):
    p = write(tmp_path, "nt.csv", "a,b,c\n3,2,1\n1,1,3\n2,3,2\n")
    with pytest.raises(ColumnError) as err:
        read(p)
    assert "no time column" in one_line(err) and "time=" in str(err.value)


def test_time_that_cannot_be_parsed(tmp_path):
    p = write(tmp_path, "bt.csv", "time,a,b\nmorning,1,2\nnoon,2,3\nevening,3,4\n")
    with pytest.raises(TimeError) as err:
        read(p)
    msg = one_line(err)
    assert str(p) in msg and "column 'time'" in msg and "row 2" in msg
    assert "ISO-8601" in msg


def test_too_few_samples_in_a_trajectory(tmp_path):
    text = "run,time,a,b\nx,0,1,2\nx,1,2,3\nx,2,3,4\ny,0,1,2\ny,1,,3\n"
    p = write(tmp_path, "few.csv", text)
    with pytest.raises(TooFewSamplesError) as err:
        read(p)
    msg = one_line(err)
    assert "trajectory 'y'" in msg and "column 'run'" in msg and "row 5" in msg
    assert "1 missing value" in msg and "min_samples" in msg
    assert read(p, min_samples=1).n_trajectories == 2
    p = write(tmp_path, "few2.csv", "time,a,b\n0,1,2\n1,x,3\n")
    with pytest.raises(TooFewSamplesError, match="only 1 usable sample"):
        read(p)


def test_interleaved_blocks_sharing_an_id_are_refused(tmp_path):
    t, x, y = curves(5)
    rows = ["run,time,a,b"]
    for name in ("1", "2", "1"):
        rows += [f"{name},{a},{b},{c}" for a, b, c in zip(t, x, y, strict=True)]
    p = write(tmp_path, "il.csv", "\n".join(rows))
    with pytest.raises(TimeError) as err:
        read(p)
    msg = one_line(err)
    assert str(p) in msg and "column 'run'" in msg and "row 12" in msg
    assert "trajectory '1'" in msg and "own id" in msg


def test_continuing_blocks_of_one_id_are_fine(tmp_path):
    t, x, y = curves(10)
    rows = ["run,time,a,b"]
    for name, part in (("1", slice(0, 5)), ("2", slice(0, 5)), ("1", slice(5, 10))):
        rows += [f"{name},{a},{b},{c}" for a, b, c in zip(t[part], x[part], y[part], strict=True)]
    rec = read(write(tmp_path, "ok.csv", "\n".join(rows)))
    assert rec.samples_per_trajectory() == {"1": 10, "2": 5}


def test_bad_options_and_sources(tmp_path):
    p = write(tmp_path, "o.csv", "time,a,b\n0,1,2\n1,2,3\n2,3,4\n")
    for kwargs in (
        {"repeated_times": "mean"},
        {"outliers": "remove"},
        {"outlier_window": 2},
        {"outlier_threshold": -1},
        {"gap_factor": 0.5},
        {"min_samples": 0},
        {"decimal": ";"},
        {"channels": "a"},
    ):
        with pytest.raises(InputError):
            read(p, **kwargs)
    with pytest.raises(InputError, match="cannot read a int"):
        read(3)
    with pytest.raises(InputError, match=r"\.xls workbooks"):
        read(tmp_path / "old.xls")
    with pytest.raises(InputError, match="time_unit"):
        read(
            pd.DataFrame(
                {"date": pd.date_range("2024", periods=3), "a": [1, 2, 3.0], "b": [3, 2, 1.0]}
            ),
            time_unit="fortnight",
        )


def test_binary_file_is_refused(tmp_path):
    p = tmp_path / "b.csv"
    p.write_bytes(b"\x00\x01\x02binary")
    with pytest.raises(InputError, match="binary"):
        read(p)


def test_folder_is_refused(tmp_path):
    with pytest.raises(InputError, match="folder"):
        read(tmp_path)


# -- source never modified, outputs ------------------------------------------------------
def test_source_file_is_not_modified(tmp_path):
    text = "# note\ntime,x,y\n0,1,2\n2,3,4\n1,2,3\n1,2,3\n3,,5\n4,5,6\n"
    p = write(tmp_path, "keep.csv", text)
    before, mtime = digest(p), p.stat().st_mtime_ns
    read(p)
    read(p, outliers="drop", repeated_times="refuse")
    assert digest(p) == before and p.stat().st_mtime_ns == mtime
    assert sorted(x.name for x in tmp_path.iterdir()) == ["keep.csv"]


def test_describe_has_the_check_layout(tmp_path):
    text = (
        "run,time [s],x [K],y [K]\n"
        "a,0,1,2\na,1,2,3\na,1,2,3\na,2,,4\na,3,4,5\nb,0,1,1\nb,1,2,2\nb,2,3,3\n"
    )
    rec = read(write(tmp_path, "d.csv", text))
    d = rec.describe()
    for key in ("input_rows", "kept_rows", "dropped", "merged_rows", "outliers", "trajectories"):
        assert key in d
    assert d["input_rows"] == 8 and d["kept_rows"] == 6 and d["merged_rows"] == 0
    assert d["dropped"] == {"duplicate row": 1, "missing value": 1}
    assert d["trajectories"] == 2
    assert {"uniform", "median_step", "jitter"} <= set(d["sampling"])
    json.dumps(d)  # serialisable
    text_summary = rec.summary()
    for piece in (
        "trajectories    2",
        "samples         6",
        "time span",
        "uniform",
        "median step",
        "jitter",
        "gaps",
        "x [K]",
        "duplicate row: 1",
        "missing value: 1",
    ):
        assert piece in text_summary
    full = rec.log.to_dict(rows=True)
    assert len(full["rows"]) == 8 and full["rows"][2]["reason"] == "duplicate row"


def test_reason_table_is_complete():
    assert REASONS[0] is None
    assert {
        "missing trajectory id",
        "missing time",
        "unparseable time",
        "missing value",
        "non-numeric value",
        "non-finite value",
        "duplicate row",
        "repeated timestamp",
        "outlier",
    } == set(REASONS[1:])


# -- demo recordings -------------------------------------------------------------------
@pytest.mark.skipif(not (DEMO / "expected.json").exists(), reason="demo data not generated")
@pytest.mark.parametrize("name", ["chamber_cooling.csv", "torsion_rig.csv", "reactor_runaway.csv"])
def test_demo_files_read_as_documented(name):
    expected = json.loads((DEMO / "expected.json").read_text())["files"][name]
    path = DEMO / name
    before = digest(path)
    rec = read(path)
    assert digest(path) == before
    log = rec.log
    assert log.input_rows == expected["input_rows"]
    assert log.kept_rows == expected["kept_rows"]
    assert log.dropped() == expected["dropped"]
    assert log.merged_rows == expected["merged_rows"]
    assert sorted(log.rows_with("merged")) == expected.get("merged_lines", [])
    assert rec.n_samples == expected["samples"]
    assert rec.n_trajectories == expected["trajectories"]
    assert list(rec.channels) == expected["channels"]
    assert list(rec.units) == expected["units"]
    assert rec.time_unit == expected["time_unit"]
    assert rec.n_gaps == expected["gaps"]
    flagged = set(rec.source_rows[rec.outlier].tolist())
    assert set(expected["outlier_lines"]) <= flagged
    assert len(flagged) <= len(expected["outlier_lines"]) + 1
    assert_consistent(rec)


def test_row_counter_and_bookkeeping_columns_are_not_channels(tmp_path):
    t, x, y = curves(6)
    df = pd.DataFrame({"time": t, "x": x, "y": y})
    p = tmp_path / "idx.csv"
    df.to_csv(p)  # writes the index as an unnamed first column
    rec = read(p)
    assert rec.channels == ("x", "y")
    rec = read(pd.read_csv(p))  # pandas names it 'Unnamed: 0'
    assert rec.channels == ("x", "y")
