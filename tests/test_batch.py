"""Tests of the batch runner: one row per file, errors recorded, seeds, outputs, CLI."""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.integrate import solve_ivp

import fitdyn
from fitdyn.batch import batch, file_seeds, find_sources, json_names, summary
from fitdyn.cli import main
from fitdyn.diagnostics import NAMES as CHECK_NAMES
from fitdyn.errors import FitdynError, InputError, ReportError
from fitdyn.simulate import write_csv

DEMO = Path(__file__).resolve().parent.parent / "data_demo"

# invented coupled tank rig: water level and inflow deviation, one matrix per class
SYSTEMS = {
    "spiral": [[-0.5, 1.0], [-1.0, -0.5]],
    "node": [[-0.6, 0.2], [0.1, -0.3]],
    "saddle": [[0.2, 0.5], [0.4, -0.6]],
}
FAST = {"method": "discrete"}  # the one-step fit: milliseconds per file


def _simulate(name: str, seed: int, n: int = 60):
    A = SYSTEMS[name]
    x0 = [[1.5, -1.0], [-1.0, 1.5]] if name == "saddle" else [1.5, -1.0]
    times = np.arange(n) * 0.2
    return fitdyn.simulate(
        A,
        [2.0, 1.0],
        x0,
        times,
        process_noise=0.01,
        measurement_noise=0.002,
        seed=seed,
        channels=("level", "inflow"),
    )


def _folder(root: Path) -> Path:
    """Four good recordings (three kinds of text file) and two bad ones."""
    root.mkdir(parents=True, exist_ok=True)
    write_csv(_simulate("spiral", 1), root / "rig_a.csv")
    write_csv(_simulate("node", 2), root / "rig_b.csv")
    write_csv(_simulate("saddle", 3), root / "rig_c.tsv", sep="\t")
    write_csv(_simulate("spiral", 4), root / "rig_d.txt")
    (root / "rig_e_short.csv").write_text("time,level,inflow\n0,1,2\n")
    (root / "rig_f_empty.csv").write_text("")
    (root / "notes.md").write_text("not a recording\n")
    (root / ".hidden.csv").write_text("time,a,b\n")
    return root


@pytest.fixture(scope="module")
def rigs(tmp_path_factory) -> Path:
    return _folder(tmp_path_factory.mktemp("rigs") / "runs")


@pytest.fixture(scope="module")
def boot_table(rigs) -> pd.DataFrame:
    return batch(rigs, bootstrap=50, seed=11, quiet=True, **FAST)


def _digest(folder: Path) -> dict[str, str]:
    return {
        p.name: hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.iterdir())
        if p.is_file()
    }


# ----------------------------------------------------------------------------------
# rows and errors
# ----------------------------------------------------------------------------------
def test_every_file_has_one_row_and_bad_files_are_recorded(rigs, boot_table):
    t = boot_table
    expected = [
        os.path.join(os.fspath(rigs), n)
        for n in (
            "rig_a.csv",
            "rig_b.csv",
            "rig_c.tsv",
            "rig_d.txt",
            "rig_e_short.csv",
            "rig_f_empty.csv",
        )
    ]
    assert list(t["file"]) == expected  # sorted; notes.md and the hidden file are not taken
    status = dict(zip(t["file"].map(lambda p: Path(p).name), t["status"], strict=True))
    assert status == {
        "rig_a.csv": "ok",
        "rig_b.csv": "ok",
        "rig_c.tsv": "ok",
        "rig_d.txt": "ok",
        "rig_e_short.csv": "error",
        "rig_f_empty.csv": "error",
    }
    bad = t[t["status"] == "error"]
    for path, msg in zip(bad["file"], bad["message"], strict=True):
        assert Path(path).name in msg  # the message names the file
        assert "\n" not in msg and not msg.startswith("internal error")
        assert np.isnan(bad.loc[bad["file"] == path, "trace"]).all()
    assert "at least 3" in bad["message"].iloc[0]
    ok = t[t["status"] == "ok"]
    assert (ok["message"] == "").all()
    assert set(ok["method"]) == {"discrete"}
    assert (ok["samples"] == [60, 60, 120, 60]).all()
    assert (ok["trajectories"] == [1, 1, 2, 1]).all()
    assert list(ok["label"]) == ["stable spiral", "stable node", "saddle", "stable spiral"]


def test_an_unexpected_exception_is_recorded_as_internal_error(rigs, monkeypatch):
    import fitdyn.analysis

    real = fitdyn.analysis.fit

    def flaky(data, **kw):
        if str(data).endswith("rig_b.csv"):
            raise ZeroDivisionError("boom")
        return real(data, **kw)

    monkeypatch.setattr(fitdyn.analysis, "fit", flaky)
    t = batch(rigs, quiet=True, **FAST)
    row = t[t["file"].str.endswith("rig_b.csv")].iloc[0]
    assert row["status"] == "error"
    assert row["message"].startswith("internal error: ZeroDivisionError: boom")
    assert (t[t["file"].str.endswith(("rig_a.csv", "rig_c.tsv"))]["status"] == "ok").all()
    assert len(t) == 6


def test_without_intervals_the_table_has_no_interval_columns(rigs):
    t = batch([rigs / "rig_a.csv"], quiet=True, **FAST)
    assert "trace_low" not in t and "p_stable" not in t
    assert {"warning_count", "warnings", "label", "stability"} <= set(t.columns)


# ----------------------------------------------------------------------------------
# correctness of the columns
# ----------------------------------------------------------------------------------
def test_row_equals_a_single_fit_with_the_derived_seed(rigs, boot_table):
    t = boot_table
    # the seed of file i is the i-th spawned child of SeedSequence(11)
    # (numpy's SeedSequence.spawn, documented for independent streams)
    kids = np.random.SeedSequence(11).spawn(len(t))
    expect = [int(k.generate_state(1, np.uint64)[0] >> np.uint64(1)) for k in kids]
    assert list(t["seed"]) == expect
    for _, row in t[t["status"] == "ok"].iterrows():
        res = fitdyn.fit(row["file"], bootstrap=50, seed=int(row["seed"]), quiet=True, **FAST)
        A = res.matrix
        assert [row["a11"], row["a12"], row["a21"], row["a22"]] == A.ravel().tolist()
        assert [row["equilibrium_1"], row["equilibrium_2"]] == list(res.equilibrium)
        # invariants against numpy itself and the handbook formula tau^2 - 4 det
        assert row["trace"] == pytest.approx(np.trace(A), rel=1e-12, abs=1e-14)
        assert row["determinant"] == pytest.approx(np.linalg.det(A), rel=1e-12, abs=1e-14)
        assert row["discriminant"] == pytest.approx(
            row["trace"] ** 2 - 4 * row["determinant"], rel=1e-9, abs=1e-12
        )
        lam = np.array(
            [
                row["eigenvalue_1_real"] + 1j * row["eigenvalue_1_imag"],
                row["eigenvalue_2_real"] + 1j * row["eigenvalue_2_imag"],
            ]
        )
        ref = np.linalg.eigvals(A)
        assert np.sort_complex(lam) == pytest.approx(np.sort_complex(ref), rel=1e-9, abs=1e-12)
        assert lam[0].real >= lam[1].real  # larger real part first, as Fit sorts them
        assert (row["label"], row["stability"]) == (res.label, res.stability)
        unc = res.uncertainty
        assert row["p_stable"] == unc.p_stable
        assert row["label_probability"] == unc.class_probabilities[res.label]
        assert (row["likeliest_class"], row["likeliest_class_probability"]) == unc.verdict()
        assert row["consistent_with"] == ", ".join(unc.consistent_with)
        assert (row["trace_low"], row["trace_high"]) == tuple(unc.intervals["trace"])
        assert (row["determinant_low"], row["determinant_high"]) == tuple(
            unc.intervals["determinant"]
        )
        assert (row["max_real_part_low"], row["max_real_part_high"]) == tuple(
            unc.intervals["max_real_part"]
        )
        for k in range(2):
            for part in ("real", "imag"):
                lo, hi = unc.intervals[f"eigenvalue_{part}"][k]
                assert row[f"eigenvalue_{k + 1}_{part}_low"] == lo
                assert row[f"eigenvalue_{k + 1}_{part}_high"] == hi
        assert row["warning_count"] == len(res.warnings)
        assert row["scheme"] == unc.scheme


def test_demo_recordings_match_single_fits():
    t = batch(DEMO, seed=2, quiet=True)
    assert list(t["file"].map(lambda p: Path(p).name)) == [
        "chamber_cooling.csv",
        "reactor_runaway.csv",
        "torsion_rig.csv",
    ]
    assert (t["status"] == "ok").all(), t["message"].tolist()
    for _, row in t.iterrows():
        res = fitdyn.fit(row["file"], seed=int(row["seed"]), bootstrap=0, quiet=True)
        assert row["method"] == res.method and row["label"] == res.label
        assert row["samples"] == res.recording.n_samples
        assert row["trajectories"] == res.recording.n_trajectories
        assert [row["a11"], row["a12"], row["a21"], row["a22"]] == res.matrix.ravel().tolist()
        assert row["warning_count"] == len(res.warnings)
        assert row["warnings"] == " | ".join(" ".join(w.split()) for w in res.warnings)
    # the classes given in data_demo/README.md
    assert list(t["label"]) == ["stable node", "saddle", "stable spiral"]


# ----------------------------------------------------------------------------------
# the verdict and the adequacy checks
# ----------------------------------------------------------------------------------
CHECKS = [f"check_{name}" for name in CHECK_NAMES]
VERDICT = [
    "verdict_stability",
    "verdict_label",
    "verdict_candidates",
    "not_reliable",
    "checks_warn",
    "checks_fail",
]


def _pendulum_csv(path: Path, theta0: float = 2.5) -> Path:
    """A damped pendulum (g / L = 9.81, 1 m arm) released at theta0 rad, simulated with
    scipy's general ODE solver, 1 % sensor noise: far from linear at 2.5 rad."""
    t = np.linspace(0.0, 10.0, 200)
    sol = solve_ivp(
        lambda _t, y: [y[1], -9.81 * np.sin(y[0]) - 0.3 * y[1]],
        (t[0], t[-1]),
        [theta0, 0.0],
        t_eval=t,
        rtol=1e-10,
        atol=1e-12,
        method="DOP853",
    )
    assert sol.success
    X = sol.y.T
    X = X + np.random.default_rng(2).normal(0.0, 1.0, X.shape) * 0.01 * X.std(axis=0)
    pd.DataFrame({"time": t, "angle": X[:, 0], "rate": X[:, 1]}).to_csv(path, index=False)
    return path


def _verdict_cells(res) -> dict[str, str]:
    """What the verdict and check columns must hold for a fit, built from the Fit."""
    v = res.verdict
    by = {d.name: d.verdict for d in res.diagnostics}
    cells = {
        "verdict_stability": v.stability,
        "verdict_label": v.label if v.assessed else "not assessed",
        "verdict_candidates": "; ".join(v.candidates),
        "not_reliable": "; ".join(n for n, _ in v.not_reliable),
        "checks_warn": "; ".join(n for n in by if by[n] == "warn"),
        "checks_fail": "; ".join(n for n in by if by[n] == "fail"),
    }
    cells.update({f"check_{n}": by[n] for n in CHECK_NAMES})
    return cells


def test_verdict_columns_follow_the_point_estimate_in_every_table(rigs, boot_table):
    plain = batch(rigs, seed=11, quiet=True, **FAST)
    for t in (plain, boot_table):
        cols = list(t.columns)
        at = cols.index("stability") + 1
        assert cols[at : at + len(VERDICT) + len(CHECKS)] == VERDICT + CHECKS
        assert cols[: cols.index("label")][:4] == ["file", "status", "message", "seed"]
        bad = t[t["status"] == "error"]
        assert bad[VERDICT + CHECKS].isna().all().all()  # error rows: empty cells


def test_bootstrap_0_says_not_assessed_and_still_reports_the_checks(rigs):
    t = batch([rigs / "rig_a.csv", rigs / "rig_b.csv"], seed=4, quiet=True, **FAST)
    assert (t["verdict_stability"] == "not assessed").all()
    assert (t["verdict_label"] == "not assessed").all()  # never the point class again
    assert (t["verdict_candidates"] == "").all()
    assert list(t["label"]) == ["stable spiral", "stable node"]  # the point estimate
    for _, row in t.iterrows():
        res = fitdyn.fit(row["file"], seed=int(row["seed"]), bootstrap=0, quiet=True, **FAST)
        assert {k: row[k] for k in VERDICT + CHECKS} == _verdict_cells(res)
        assert set(row[CHECKS]) <= {"pass", "warn", "fail"}
    text = summary(t)
    assert "verdict not assessed for 2 of 2" in text and "--bootstrap" in text


def test_asymptotic_intervals_give_a_verdict_without_bootstrap(rigs):
    t = batch([rigs / "rig_a.csv"], seed=4, asymptotic=True, quiet=True, **FAST)
    assert t["verdict_stability"].iloc[0] in {"stable", "unstable", "undetermined"}
    assert t["verdict_label"].iloc[0] != "not assessed"


def test_bootstrap_decides_the_clear_cases(rigs, boot_table):
    ok = boot_table[boot_table["status"] == "ok"].set_index(
        boot_table.loc[boot_table["status"] == "ok", "file"].map(lambda p: Path(p).name)
    )
    # the true classes, by the trace-determinant rule (det > 0, trace < 0, trace^2 <
    # 4 det: stable spiral; det < 0: saddle; common practice, no source) checked with
    # numpy's eigenvalues of the simulated matrices
    lam = np.linalg.eigvals(np.array(SYSTEMS["spiral"]))
    assert (lam.real < 0).all() and (lam.imag != 0).any()
    assert np.prod(np.linalg.eigvals(np.array(SYSTEMS["saddle"]))).real < 0
    for name in ("rig_a.csv", "rig_d.txt"):
        assert ok.loc[name, "verdict_stability"] == "stable"
        assert ok.loc[name, "verdict_label"] == "stable spiral"
        assert ok.loc[name, "verdict_candidates"].split("; ")[0] == "stable spiral"
    assert ok.loc["rig_c.tsv", "verdict_stability"] == "unstable"
    assert ok.loc["rig_c.tsv", "verdict_label"] == "saddle"
    for _, row in ok.iterrows():  # the row is the single fit's verdict, cell for cell
        res = fitdyn.fit(row["file"], bootstrap=50, seed=int(row["seed"]), quiet=True, **FAST)
        assert {k: row[k] for k in VERDICT + CHECKS} == _verdict_cells(res)
    text = summary(boot_table)
    assert "verdict at the 95 % level, stability: stable 3, unstable 1" in text


def test_a_file_that_fails_a_check_is_flagged_not_reliable(tmp_path):
    src = _pendulum_csv(tmp_path / "swing.csv")
    small = _pendulum_csv(tmp_path / "swing_small.csv", theta0=0.05)
    t = batch([src, small], seed=3, bootstrap=30, quiet=True, **FAST)
    big, calm = t.iloc[0], t.iloc[1]
    assert big["check_nonlinearity"] == "fail"
    assert "nonlinearity" in big["not_reliable"].split("; ")
    assert big["checks_fail"] == big["not_reliable"]
    assert big["label"] == "stable spiral"  # the point class alone would look fine
    assert calm["check_nonlinearity"] == "pass"
    res = fitdyn.fit(src, seed=int(big["seed"]), bootstrap=30, quiet=True, **FAST)
    assert {k: big[k] for k in VERDICT + CHECKS} == _verdict_cells(res)
    # the small swing passes nonlinearity (it may fail whiteness: the one-step fit
    # does not model sensor noise); the summary counts every flagged file
    flagged = int((t["not_reliable"] != "").sum())
    assert f"not reliable (an adequacy check failed) for {flagged} of 2" in summary(t)
    # the CSV table carries the same cells, through the spreadsheet-safe writer
    out = tmp_path / "tables" / "res.csv"
    batch([src, small], seed=3, bootstrap=30, out=out, quiet=True, **FAST)
    back = pd.read_csv(out, keep_default_na=False)
    assert list(back.columns) == list(t.columns)
    for col in VERDICT + CHECKS:
        assert list(back[col]) == list(t[col]), col


def test_resume_refits_rows_journaled_before_the_verdict_columns(rigs, tmp_path, monkeypatch):
    import fitdyn.analysis
    from fitdyn.batch import journal_path

    out = tmp_path / "res.csv"
    first = batch(rigs, seed=11, out=out, quiet=True, **FAST)
    jp = journal_path(out)
    lines = jp.read_text().splitlines()
    new = set(VERDICT + CHECKS)
    old_style = [lines[0]]
    for line in lines[1:]:  # an older fitdyn's rows: no verdict or check keys
        entry = json.loads(line)
        entry["row"] = {k: v for k, v in entry["row"].items() if k not in new}
        old_style.append(json.dumps(entry))
    jp.write_text("\n".join(old_style) + "\n")

    real = fitdyn.analysis.fit
    fitted: list[str] = []

    def counted(data, **kw):
        fitted.append(Path(data).name)
        return real(data, **kw)

    monkeypatch.setattr(fitdyn.analysis, "fit", counted)
    again = batch(rigs, seed=11, out=out, quiet=True, **FAST)
    # the fitted rows are fitted again (none left without its verdict); the error
    # rows are reused and their new cells stay empty
    assert sorted(fitted) == ["rig_a.csv", "rig_b.csv", "rig_c.tsv", "rig_d.txt"]
    pd.testing.assert_frame_equal(again, first, check_exact=True)
    assert again.loc[again["status"] == "error", VERDICT + CHECKS].isna().all().all()
    # and the journal now holds full rows: a third run fits nothing
    fitted.clear()
    third = batch(rigs, seed=11, out=out, quiet=True, **FAST)
    assert fitted == []
    pd.testing.assert_frame_equal(third, first, check_exact=True)


def test_a_reused_row_without_the_new_keys_fills_empty():
    from fitdyn.batch import _columns, _table

    old = {"file": "x.csv", "seed": 1, "status": "ok", "message": "", "label": "saddle"}
    t = _table([old], _columns(False, False))
    assert t[VERDICT + CHECKS].isna().all().all()
    assert t["label"].iloc[0] == "saddle"


# ----------------------------------------------------------------------------------
# reproducibility and parallelism
# ----------------------------------------------------------------------------------
def test_two_workers_give_the_same_table_as_one(rigs, boot_table):
    env = dict(os.environ)
    two = batch(rigs, bootstrap=50, seed=11, quiet=True, workers=2, chunk=1, **FAST)
    pd.testing.assert_frame_equal(two, boot_table, check_exact=True)
    assert dict(os.environ) == env  # the workers' one-thread setting is not left behind


def _die_on_rig_b(tasks, options):
    """Stands in for a worker killed mid-file (a crash in compiled code, out of memory)."""
    from fitdyn.batch import _fit_chunk

    if any(path.endswith("rig_b.csv") for _, path, _, _ in tasks):
        os._exit(3)
    return _fit_chunk(tasks, options)


def test_a_worker_that_dies_costs_only_its_own_file(rigs, boot_table):
    from fitdyn.batch import _run_pool

    paths = find_sources(rigs)
    _, seeds = file_seeds(11, len(paths))
    tasks = [(i, p, s, None) for i, (p, s) in enumerate(zip(paths, seeds, strict=True))]
    rows: dict[int, dict] = {}

    def done(new):
        for r in new:
            rows[r.pop("index")] = r

    options = dict(FAST, bootstrap=50, confidence=0.95)
    chunks = [tasks[i : i + 2] for i in range(0, len(tasks), 2)]  # rig_a shares rig_b's
    _run_pool(chunks, options, 2, done, fn=_die_on_rig_b)
    assert sorted(rows) == list(range(len(tasks)))
    status = {Path(r["file"]).name: (r["status"], r["message"]) for r in rows.values()}
    assert status["rig_b.csv"][0] == "error"
    assert status["rig_b.csv"][1].startswith("internal error: the worker process")
    for i, name in enumerate(boot_table["file"]):
        if not name.endswith("rig_b.csv"):
            assert rows[i]["status"] == boot_table["status"].iloc[i]
            if rows[i]["status"] == "ok":
                assert rows[i]["trace_low"] == boot_table["trace_low"].iloc[i]


def test_workers_refused_when_the_calling_script_cannot_be_reimported(rigs, monkeypatch):
    import sys
    import types

    fake = types.ModuleType("__main__")
    fake.__file__ = "<stdin>"
    monkeypatch.setitem(sys.modules, "__main__", fake)
    with pytest.raises(FitdynError, match="workers=1"):
        batch(rigs, workers=2, quiet=True, **FAST)


def test_same_seed_same_numbers_other_seed_other_numbers(rigs, boot_table):
    again = batch(rigs, bootstrap=50, seed=11, quiet=True, chunk=2, **FAST)
    pd.testing.assert_frame_equal(again, boot_table, check_exact=True)
    other = batch(rigs, bootstrap=50, seed=12, quiet=True, **FAST)
    ok = boot_table["status"] == "ok"
    assert (other.loc[ok, "trace"] == boot_table.loc[ok, "trace"]).all()  # point fit: no draws
    assert not np.array_equal(other.loc[ok, "trace_low"], boot_table.loc[ok, "trace_low"])


def test_a_drawn_master_seed_is_kept_and_repeats_the_run(rigs):
    first = batch([rigs / "rig_a.csv", rigs / "rig_b.csv"], bootstrap=20, quiet=True, **FAST)
    master = first.attrs["seed"]
    assert isinstance(master, int)
    again = batch([rigs / "rig_a.csv", rigs / "rig_b.csv"], bootstrap=20, seed=master, **FAST)
    pd.testing.assert_frame_equal(again, first, check_exact=True)


def test_file_seeds_depend_only_on_master_and_position():
    m, five = file_seeds(7, 5)
    _, three = file_seeds(7, 3)
    assert m == 7 and five[:3] == three
    assert len(set(five)) == 5 and all(0 <= s < 2**63 for s in five)
    with pytest.raises(FitdynError):
        file_seeds(-1, 2)


# ----------------------------------------------------------------------------------
# inputs
# ----------------------------------------------------------------------------------
def test_folder_glob_and_list_inputs(rigs):
    by_folder = find_sources(rigs)
    assert [Path(p).name for p in by_folder] == [
        "rig_a.csv",
        "rig_b.csv",
        "rig_c.tsv",
        "rig_d.txt",
        "rig_e_short.csv",
        "rig_f_empty.csv",
    ]
    pattern = os.path.join(os.fspath(rigs), "rig_[ab].csv")
    assert [Path(p).name for p in find_sources(pattern)] == ["rig_a.csv", "rig_b.csv"]
    deep = os.path.join(os.fspath(rigs.parent), "**", "*.tsv")
    assert [Path(p).name for p in find_sources(deep)] == ["rig_c.tsv"]
    # a list: sorted, each file once however it is named, the output table set aside
    listed = find_sources(
        [rigs / "rig_b.csv", rigs / "rig_a.csv", pattern, rigs / "notes.md"],
        exclude=[rigs / "rig_b.csv"],
    )
    assert [Path(p).name for p in listed] == ["notes.md", "rig_a.csv"]
    t = batch(pattern, quiet=True, **FAST)
    assert list(t["status"]) == ["ok", "ok"]


def test_sources_that_name_nothing_are_refused(tmp_path):
    with pytest.raises(InputError, match="no file matches"):
        find_sources(os.path.join(os.fspath(tmp_path), "*.csv"))
    with pytest.raises(InputError, match="no such file"):
        find_sources(tmp_path / "missing.csv")
    with pytest.raises(InputError, match="holds no"):
        find_sources(tmp_path)
    with pytest.raises(InputError):
        find_sources([])


@pytest.mark.parametrize(
    "kwargs",
    [
        {"workers": 0},
        {"bootstrap": -1},
        {"confidence": 1.5},
        {"method": "nonsense"},
        {"backend": "cluster"},
        {"chunk": 0},
        {"colour": "red"},
    ],
)
def test_bad_arguments_are_refused_before_fitting(rigs, kwargs):
    with pytest.raises(FitdynError):
        batch(rigs, quiet=True, **kwargs)


# ----------------------------------------------------------------------------------
# outputs
# ----------------------------------------------------------------------------------
def test_csv_table_is_written_and_reads_back(rigs, boot_table, tmp_path):
    before = _digest(rigs)
    out = tmp_path / "tables" / "results.csv"
    t = batch(rigs, bootstrap=50, seed=11, out=out, quiet=True, **FAST)
    pd.testing.assert_frame_equal(t, boot_table, check_exact=True)
    # no temporary left; the journal that lets a rerun skip unchanged files stays
    assert sorted(p.name for p in out.parent.iterdir()) == [
        ".results.csv.fitdyn-journal.jsonl",
        "results.csv",
    ]
    back = pd.read_csv(out)
    assert list(back.columns) == list(t.columns)
    num = t.select_dtypes("number").columns
    np.testing.assert_array_equal(back[num].to_numpy(float), t[num].to_numpy(float))
    pd.testing.assert_series_equal(back["status"], t["status"], check_dtype=False)
    assert _digest(rigs) == before  # sources untouched


def test_a_failed_table_write_leaves_the_previous_table(rigs, tmp_path, monkeypatch):
    out = tmp_path / "results.csv"
    out.write_text("previous\n")

    def broken(self, path, *args, **kwargs):
        Path(path).write_text("half")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", broken)
    with pytest.raises(OSError):
        batch([rigs / "rig_a.csv"], out=out, quiet=True, **FAST)
    assert out.read_text() == "previous\n"
    # no temporary left; the journal keeps the fitted row for a rerun
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        ".results.csv.fitdyn-journal.jsonl",
        "results.csv",
    ]


def test_parquet_table(rigs, tmp_path):
    pytest.importorskip("pyarrow")
    out = tmp_path / "results.parquet"
    t = batch(rigs, seed=1, out=out, quiet=True, **FAST)
    back = pd.read_parquet(out)
    assert len(back) == 6 and list(back.columns) == list(t.columns)
    np.testing.assert_array_equal(back["trace"].to_numpy(float), t["trace"].to_numpy(float))


def test_unwritable_outputs_are_refused_before_fitting(rigs, tmp_path):
    with pytest.raises(ReportError, match="folder"):
        batch(rigs, out=tmp_path, quiet=True)  # a folder, not a file
    blocker = tmp_path / "plain_file"
    blocker.write_text("x")
    with pytest.raises(ReportError):
        batch(rigs, out=blocker / "results.csv", quiet=True)
    with pytest.raises(ReportError):
        batch(rigs, json_dir=blocker / "json", quiet=True)


def test_json_results_one_file_per_recording(rigs, tmp_path):
    jdir = tmp_path / "json"
    t = batch(rigs, bootstrap=20, seed=3, json_dir=jdir, quiet=True, **FAST)
    ok = t[t["status"] == "ok"]
    assert sorted(p.name for p in jdir.iterdir()) == [
        "rig_a.json",
        "rig_b.json",
        "rig_c.json",
        "rig_d.json",
    ]
    assert t.loc[t["status"] == "error", "json_file"].isna().all()
    for _, row in ok.iterrows():
        d = json.loads(Path(row["json_file"]).read_text())
        assert d["schema"] == "fitdyn/1"
        assert d["source"] == row["file"]
        assert d["matrix"] == [[row["a11"], row["a12"]], [row["a21"], row["a22"]]]
        assert d["uncertainty"]["seed"] == row["seed"]
        assert d["uncertainty"]["p_stable"] == row["p_stable"]


def test_json_names_never_collide(tmp_path):
    names = json_names(["a/run.csv", "b/run.csv", "run.xlsx", "Run.txt", "run-2.csv"], tmp_path)
    assert [p.name for p in names] == [
        "run.json",
        "run-2.json",
        "run-3.json",
        "Run-4.json",
        "run-2-2.json",
    ]
    assert len({p.name.casefold() for p in names}) == 5


def test_same_stem_in_two_folders_gives_two_json_files(rigs, tmp_path):
    for sub in ("day1", "day2"):
        (tmp_path / sub).mkdir()
        shutil.copy(rigs / "rig_a.csv", tmp_path / sub / "run.csv")
    jdir = tmp_path / "json"
    t = batch([tmp_path / "day1", tmp_path / "day2"], json_dir=jdir, seed=0, quiet=True, **FAST)
    assert list(t["json_file"].map(lambda p: Path(p).name)) == ["run.json", "run-2.json"]
    sources = [json.loads(Path(p).read_text())["source"] for p in t["json_file"]]
    assert sources == list(t["file"])


# ----------------------------------------------------------------------------------
# progress, summary, public API
# ----------------------------------------------------------------------------------
class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_only_on_a_terminal_and_not_when_quiet(rigs, monkeypatch, capsys):
    batch([rigs / "rig_a.csv"], **FAST)
    assert capsys.readouterr().err == ""  # a pipe: silent
    term = _Terminal()
    monkeypatch.setattr("sys.stderr", term)
    batch([rigs / "rig_a.csv"], **FAST)
    assert "recordings" in term.getvalue()
    term2 = _Terminal()
    monkeypatch.setattr("sys.stderr", term2)
    batch([rigs / "rig_a.csv"], quiet=True, **FAST)
    assert term2.getvalue() == ""


def test_summary_counts_and_caution(boot_table):
    text = summary(boot_table, "results.csv")
    assert "4 of 6 recordings fitted, 2 failed" in text
    assert "stable spiral  2" in text and "saddle" in text
    assert "results.csv" in text
    assert "licensed practice" in text
    assert boot_table.attrs["caution"] in text
    assert "master seed 11" in text


def test_public_api_is_the_function():
    import sys

    import fitdyn.batch  # noqa: F401  (importing the module keeps the function)

    assert fitdyn.batch is batch
    assert sys.modules["fitdyn.batch"].batch is batch
    assert "batch" in fitdyn.__all__


# ----------------------------------------------------------------------------------
# backends
# ----------------------------------------------------------------------------------
def test_dask_backend_missing_is_a_clear_error(rigs):
    try:
        import distributed  # noqa: F401
    except ImportError:
        with pytest.raises(FitdynError, match=r"fitdyn\[dask\]"):
            batch(rigs, backend="dask", quiet=True)
    else:
        pytest.skip("dask is installed")


def test_dask_backend_gives_the_same_table(rigs, boot_table):
    pytest.importorskip("distributed")
    t = batch(rigs, bootstrap=50, seed=11, quiet=True, backend="dask", workers=2, **FAST)
    pd.testing.assert_frame_equal(t, boot_table, check_exact=True)


# ----------------------------------------------------------------------------------
# command line
# ----------------------------------------------------------------------------------
def run(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_batch_writes_table_and_prints_summary(rigs, tmp_path, capsys):
    out = tmp_path / "res.csv"
    jdir = tmp_path / "json"
    code, text, err = run(
        ["batch", rigs, "--out", out, "--method", "discrete", "--bootstrap", "20",
         "--seed", "5", "--json-dir", jdir],
        capsys,
    )  # fmt: skip
    assert code == 0, err
    assert "4 of 6 recordings fitted, 2 failed" in text
    assert f"table written to {out}" in text
    assert "stable spiral" in text and "licensed practice" in text
    assert "2 of 6 recordings failed" in err and len(err.strip().splitlines()) == 1
    t = pd.read_csv(out)
    assert len(t) == 6 and (t["status"] == "ok").sum() == 4
    api = batch(rigs, bootstrap=20, seed=5, quiet=True, **FAST)
    np.testing.assert_array_equal(t["trace_low"].to_numpy(float), api["trace_low"].to_numpy(float))
    assert len(list(jdir.iterdir())) == 4


def test_cli_batch_with_import_options_and_quiet(rigs, tmp_path, capsys):
    out = tmp_path / "res.csv"
    code, text, err = run(
        ["batch", rigs / "rig_a.csv", rigs / "rig_b.csv", "--out", out, "--channels",
         "inflow,level", "--outliers", "ignore", "--method", "discrete", "--quiet"],
        capsys,
    )  # fmt: skip
    assert code == 0, err
    assert text == "" and err == ""
    t = pd.read_csv(out)
    assert list(t["channel_1"]) == ["inflow", "inflow"]
    # the batch default is --bootstrap 0: the table says so instead of a verdict
    assert list(t["verdict_stability"]) == ["not assessed", "not assessed"]
    assert list(t["verdict_label"]) == ["not assessed", "not assessed"]


def test_cli_batch_help_says_what_bootstrap_0_means(capsys):
    with pytest.raises(SystemExit):
        main(["batch", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "default 0" in text and "'not assessed'" in text
    assert "label and stability are the point estimate" in text


@pytest.mark.parametrize(
    "args",
    [
        ["batch", "{tmp}/nothing/*.csv", "--out", "{tmp}/r.csv"],
        ["batch", "{tmp}/missing.csv", "--out", "{tmp}/r.csv"],
        ["batch", "{rigs}", "--out", "{tmp}"],
        ["batch", "{rigs}", "--out", "{tmp}/r.csv", "--workers", "0"],
        ["batch", "{rigs}", "--out", "{tmp}/r.csv", "--confidence", "2"],
    ],
)
def test_cli_batch_bad_arguments_exit_2_in_one_line(rigs, tmp_path, capsys, args):
    args = [a.format(tmp=tmp_path, rigs=rigs) for a in args]
    code, text, err = run(args, capsys)
    assert code == 2
    assert err.startswith("fitdyn: error: ") and len(err.strip().splitlines()) == 1
    assert "Traceback" not in err
    assert not (tmp_path / "r.csv").exists()
